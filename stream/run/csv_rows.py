"""CSV text of a frame of predictions, the bytes ``DataFrame.to_csv(index=False)`` writes,
made column by column.

``to_csv`` hands every row to Python's csv writer; for the few column kinds a predictions
frame holds this module formats whole columns at once (integers with ``str``, floats
with ``repr``, the shortest text that reads back as the same double, which is what
pandas writes too; text quoted as the csv module's minimal quoting does under pandas: a
field holding the delimiter, a quote or a newline is quoted, its quotes doubled) and
joins the rows once. Any other column kind (booleans, times, objects that are not all text) makes
:func:`csv_text` return None, and the caller uses ``to_csv``.
"""

from __future__ import annotations

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
        if np.isnan(values).any():
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
