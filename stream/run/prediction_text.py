"""The text of a frame of predictions, made column by column: CSV, the bytes
``DataFrame.to_csv(index=False)`` writes, and JSON lines, the bytes
``DataFrame.to_json(orient="records", lines=True)`` writes.

``to_csv`` hands every row to Python's csv writer; for the few column kinds a predictions
frame holds this module formats whole columns at once (integers with ``str``, floats
with ``repr``, the shortest text that reads back as the same double, which is what
pandas writes too; text quoted as the csv module's minimal quoting does under pandas: a
field holding the delimiter, a quote or a newline is quoted, its quotes doubled) and
joins the rows once. For JSON lines each column's values are formatted by pandas' own JSON
writer in one call (numbers) or once per distinct value (text), then the rows are
joined once. Any other column kind (booleans, times, objects that are not all text),
and for JSON more than ``MAX_DISTINCT_TEXTS`` distinct texts in a column, makes them
return None, and the caller uses pandas.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

_SPECIAL = (",", '"', "\n")
"""What makes the csv module quote a field, as pandas calls it (delimiter ",", quote
'"', line terminator "\n"; a bare "\r" is written as is)."""


def _quoted(text: str) -> str:
    if any(mark in text for mark in _SPECIAL):
        return '"' + text.replace('"', '""') + '"'
    return text


def _column_texts(values: np.ndarray) -> list[str] | None:
    kind = values.dtype.kind
    if kind in "iu":
        return list(map(str, values.tolist()))
    if kind == "f":
        texts = list(map(repr, values.tolist()))
        for i in np.flatnonzero(np.isnan(values)).tolist():
            texts[i] = ""
        return texts
    if kind == "O":
        items = values.tolist()
        if not all(type(item) is str for item in items):
            return None
        distinct = set(items)
        if any(mark in text for text in distinct for mark in _SPECIAL):
            quoted = {text: _quoted(text) for text in distinct}
            return [quoted[item] for item in items]
        return items
    return None


def csv_text(frame: pd.DataFrame, header: bool) -> str | None:
    """``frame.to_csv(index=False, header=header)``, or None when a column is of a kind
    this module does not format (the caller then uses ``to_csv``)."""
    if len(frame.columns) < 2:
        return None              # one empty field alone is written quoted: leave it to pandas
    columns = []
    for name in frame.columns:
        texts = _column_texts(frame[name].to_numpy())
        if texts is None:
            return None
        columns.append(texts)
    lines = []
    if header:
        lines.append(",".join(_quoted(str(name)) for name in frame.columns))
    if len(frame):
        lines.append("\n".join(map(",".join, zip(*columns))))
    return "\n".join(lines) + "\n" if lines else ""


MAX_DISTINCT_TEXTS = 2000
"""Distinct texts per column that :func:`json_lines_text` formats one by one; beyond,
pandas writes the frame (a column of record ids, say)."""


def _json_string(text: str) -> str:
    """``text`` as pandas' JSON writer quotes and escapes it."""
    return pd.Series([text], dtype=object).to_json(orient="values")[1:-1]


def _json_values(values: np.ndarray) -> list[str] | None:
    kind = values.dtype.kind
    if kind in "iuf":
        body = pd.Series(values).to_json(orient="values", double_precision=10)[1:-1]
        return body.split(",") if body else []
    if kind == "O":
        items = values.tolist()
        if not all(type(item) is str for item in items):
            return None
        distinct = set(items)
        if len(distinct) > MAX_DISTINCT_TEXTS:
            return None
        text = {item: _json_string(item) for item in distinct}
        return [text[item] for item in items]
    return None


def json_lines_text(frame: pd.DataFrame) -> str | None:
    """``frame.to_json(orient="records", lines=True)`` ending with one newline, or None
    when the frame is empty or a column is of a kind this module does not format."""
    if not len(frame):
        return None
    pieces = []
    for i, name in enumerate(frame.columns):
        if not isinstance(name, str):
            return None
        values = _json_values(frame[name].to_numpy())
        if values is None:
            return None
        key = _json_string(name)
        pieces.append(itertools.repeat(("{" if i == 0 else ",") + key + ":"))
        pieces.append(values)
    pieces.append(itertools.repeat("}"))
    return "\n".join(map("".join, zip(*pieces))) + "\n"
