"""Raw batches -> numeric arrays for the learner, with every bad value reported.

Inside: the value rules shared by schema inference and encoding (``MISSING_MARKERS``,
:func:`parse_numbers`, :func:`parse_times`, :func:`factorize_labels`), the
:class:`EncodedBatch` the learner consumes and the stateful :class:`Encoder` that assigns
category and class codes in first-seen order and can be saved and restored.

Value rules
-----------
* Missing: ``None``, NaN and the text markers pandas' CSV reader treats as missing by
  default (``MISSING_MARKERS``). The same set applies to JSON strings, so "NA" means
  missing whichever format it came in.
* Numbers: what ``pandas.to_numeric`` accepts. ``inf`` parses but is refused as
  "is not a finite number": no split statistic survives an infinite value.
* Labels (categories, classes, ids) are text. Numbers are printed canonically so one value
  read as ``1`` in one chunk and ``1.0`` (or the text ``"1.0"``) in another is the same
  label ``"1"``; booleans read as ``True``/``true``/``TRUE`` become ``"True"`` (likewise
  ``"False"``), the spellings pandas itself reads as booleans.
* Times: epoch seconds as numbers, or ISO-8601 text; text without an offset is UTC.

Limitations: integers beyond 2**53 that arrive as floats or mixed text lose digits in
their label; a column read with another dtype in a later chunk is handled, but a
category's code is fixed at first sight and never recycled.
"""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from connectors.base import RawBatch, Reject

from .errors import ModelFileError

if TYPE_CHECKING:  # the schema module imports the value rules from here
    from .schema import Schema

MISSING_MARKERS = frozenset({
    "", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
    "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null",
})
"""Text read as a missing value: pandas' default ``na_values`` of ``read_csv``."""

_TRUE_TEXT = frozenset({"True", "TRUE", "true"})
_FALSE_TEXT = frozenset({"False", "FALSE", "false"})
_MAX_VALUE_CHARS = 200
_STATE_FORMAT = "sapwood-encoder"
_STATE_VERSION = 1

_REASON_NUMBER = "is not a number"
_REASON_FINITE = "is not a finite number"
_REASON_TIME = "is not a time"
_REASON_NO_TARGET = "has no target value"


# ---------------------------------------------------------------------------------------
# value rules
# ---------------------------------------------------------------------------------------

def _as_array(values: Any) -> np.ndarray:
    """Values as a numpy array without copying; pandas' str columns give object arrays
    holding str and NaN."""
    if isinstance(values, (pd.Series, pd.Index)):
        return values.to_numpy()
    return np.asarray(values)


def _all_text(values: Any) -> bool:
    """True when every present value is a str (so hashing cannot merge 1 and True)."""
    if isinstance(getattr(values, "dtype", None), pd.StringDtype):
        return True
    return pd.api.types.infer_dtype(values, skipna=True) in ("string", "empty")


def missing_mask(values: Any) -> np.ndarray:
    """True where a value is missing (None, NaN or one of ``MISSING_MARKERS``)."""
    arr = _as_array(values)
    if arr.dtype.kind in "biu":
        return np.zeros(len(arr), dtype=bool)
    if arr.dtype.kind in "fcmM":
        return np.asarray(pd.isna(arr))
    series = pd.Series(arr, dtype=object, copy=False)
    return (series.isna() | series.isin(MISSING_MARKERS)).to_numpy()


def parse_numbers(values: Any) -> tuple[np.ndarray, np.ndarray]:
    """Read values as float64.

    Returns
    -------
    numbers
        float64; NaN where the value is missing or not a number (``inf`` is kept). For
        float64 input this is the input array itself: do not write to it.
    bad
        bool; True where a value is present but is not a number.
    """
    arr = _as_array(values)
    n = len(arr)
    if arr.dtype.kind in "biuf":
        return np.asarray(arr, dtype=np.float64), np.zeros(n, dtype=bool)
    if arr.dtype.kind in "mM":
        bad = ~np.asarray(pd.isna(arr))
        return np.full(n, np.nan), bad
    missing = missing_mask(arr)
    numbers = pd.to_numeric(pd.Series(arr, dtype=object, copy=False), errors="coerce")
    numbers = numbers.to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    numbers[missing] = np.nan
    bad = np.isnan(numbers) & ~missing
    return numbers, bad


def parse_times(values: Any) -> tuple[np.ndarray, np.ndarray]:
    """Read values as epoch seconds (numbers as given, ISO-8601 text; naive text is UTC).

    Returns
    -------
    seconds
        float64; NaN where missing or unreadable.
    bad
        bool; True where a value is present but is neither a number nor an ISO-8601 time.
    """
    arr = _as_array(values)
    if arr.dtype.kind == "M":
        stamps = pd.Series(pd.to_datetime(arr, utc=True))
        return _epoch_seconds(stamps), np.zeros(len(arr), dtype=bool)
    seconds, bad = parse_numbers(arr)
    seconds = seconds.copy()  # parse_numbers may hand back the input's own memory
    if bad.any():
        texts = pd.Series(arr[bad], dtype=object).astype(str)
        stamps = pd.to_datetime(texts, format="ISO8601", utc=True, errors="coerce")
        parsed = _epoch_seconds(stamps)
        seconds[bad] = parsed
        bad = bad.copy()
        bad[bad] = np.isnan(parsed)
    return seconds, bad


def _epoch_seconds(stamps: pd.Series) -> np.ndarray:
    delta = stamps - pd.Timestamp(0, tz="UTC")
    return (delta / pd.Timedelta(seconds=1)).to_numpy(dtype=np.float64, na_value=np.nan)


def _number_label(value: float | int) -> str:
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    number = float(value)
    if number.is_integer() and abs(number) < 2.0 ** 63:
        return str(int(number))
    return repr(number)


def _text_labels(texts: list[str]) -> list[str | None]:
    """Canonical label of each distinct text (None for missing)."""
    numbers = pd.to_numeric(pd.Series(texts, dtype=object), errors="coerce").to_numpy(
        dtype=np.float64, na_value=np.nan)
    labels: list[str | None] = []
    for text, number in zip(texts, numbers):
        if text in MISSING_MARKERS:
            labels.append(None)
        elif text in _TRUE_TEXT:
            labels.append("True")
        elif text in _FALSE_TEXT:
            labels.append("False")
        elif not math.isnan(number):
            labels.append(_number_label(number))
        else:
            labels.append(text)
    return labels


def factorize_labels(values: Any) -> tuple[np.ndarray, list[str | None]]:
    """Codes of each value into a list of canonical label texts.

    Work is done per distinct value, not per row. Several distinct raw values may share a
    label (``1`` and ``"1.0"`` are both ``"1"``), so ``labels`` may repeat.

    Returns
    -------
    codes
        int64, index into ``labels`` for each value, -1 where missing.
    labels
        Canonical text per distinct raw value, ``None`` when that value means missing.
    """
    arr = _as_array(values)
    kind = arr.dtype.kind
    if kind == "b":
        return arr.astype(np.int64), ["False", "True"]
    if kind in "iuf":
        codes, uniques = pd.factorize(arr)
        return codes.astype(np.int64), [_number_label(u) for u in uniques.tolist()]
    if kind in "mM":
        codes, uniques = pd.factorize(arr)
        return codes.astype(np.int64), [str(u) for u in uniques]
    if kind != "O" or not _all_text(values):
        # pandas hashes 1, 1.0 and True as one object; their labels differ ("1" vs
        # "True"), so mixed columns are compared as text.
        arr = pd.Series(arr, dtype=object, copy=False).astype(str).to_numpy(dtype=object)
    codes, uniques = pd.factorize(arr)
    labels = _text_labels([str(u) for u in uniques])
    if None in labels:  # text markers such as "NA" mean missing: code -1
        lut = np.array([i if label is not None else -1 for i, label in enumerate(labels)]
                       + [-1], dtype=np.int64)
        codes = lut[codes]
    return codes.astype(np.int64, copy=False), labels


def label_texts(values: Any) -> np.ndarray:
    """Canonical label text per value as an object array; missing becomes ``""``."""
    codes, labels = factorize_labels(values)
    lut = np.array([label if label is not None else "" for label in labels] + [""],
                   dtype=object)
    return lut[codes]  # code -1 picks the trailing ""


# ---------------------------------------------------------------------------------------
# encoder
# ---------------------------------------------------------------------------------------

@dataclasses.dataclass
class EncodedBatch:
    """Records ready for the learner; rejected rows are already removed.

    Attributes
    ----------
    X
        float64 [n, F], C-contiguous, over ``schema.feature_names``; categories as codes,
        NaN for missing.
    y
        int32 class codes (classification) or float64 values (regression).
    lines
        int64 physical line of each kept row.
    origin
        Where the records came from (file name or ``-``).
    times
        float64 epoch seconds, or None when the schema has no time field.
    ids
        object array of str (``""`` when missing), or None when the schema has no id field.
    rejects
        The source's rejects followed by one entry per bad value of this batch.
    """

    X: np.ndarray
    y: np.ndarray
    lines: np.ndarray
    origin: str
    times: np.ndarray | None
    ids: np.ndarray | None
    rejects: list[Reject]

    def __len__(self) -> int:
        return len(self.y)


class _Codebook:
    """Label -> code in first-seen order; new labels get the next code."""

    def __init__(self, labels: list[str] | None = None) -> None:
        self.labels: list[str] = []
        self.codes: dict[str, int] = {}
        for label in labels or []:
            self.add(label)

    def add(self, label: str) -> int:
        code = self.codes.get(label)
        if code is None:
            code = self.codes[label] = len(self.labels)
            self.labels.append(label)
        return code

    def encode(self, codes: np.ndarray, labels: list[str | None],
               keep: np.ndarray) -> np.ndarray:
        """Map per-row codes into ``labels`` to codebook codes (-1 missing).

        New labels are added in the order their first *kept* row appears, so a rejected
        row never creates a code.
        """
        lut = np.full(len(labels) + 1, -1, dtype=np.int64)
        kept = codes[keep]
        for unique in pd.unique(kept[kept >= 0]):
            label = labels[unique]
            if label is not None:
                lut[unique] = self.add(label)
        return lut[codes]  # -1 indexes the trailing -1


class Encoder:
    """Turns :class:`RawBatch` objects into :class:`EncodedBatch` objects for one schema.

    Parameters
    ----------
    schema
        Fields, target and task.
    """

    def __init__(self, schema: "Schema") -> None:
        self.schema = schema
        self._books = {name: _Codebook() for name, kind
                       in zip(schema.feature_names, schema.feature_kinds) if kind == "category"}
        self._classes = _Codebook()
        self._known = {field.name for field in schema.fields}
        self.unknown_fields: dict[str, int] = {}

    @property
    def classes(self) -> list[str]:
        """Class labels in code order (empty for regression)."""
        return list(self._classes.labels)

    @property
    def categories(self) -> dict[str, list[str]]:
        """Category labels in code order, per category feature."""
        return {name: list(book.labels) for name, book in self._books.items()}

    def encode(self, batch: RawBatch, scoring: bool = False) -> EncodedBatch:
        """Encode one batch; the batch and its frame are left untouched.

        With ``scoring`` the target is optional (records are predicted, not learned): a
        missing or unreadable target gives y = -1 (classification) or NaN (regression)
        instead of a reject.
        """
        schema = self.schema
        frame = batch.frame
        n = len(frame)
        lines = np.asarray(batch.lines, dtype=np.int64)
        problems: list[tuple[np.ndarray, str, str, Any]] = []
        bad_rows = np.zeros(n, dtype=bool)

        def report(mask: np.ndarray, field: str, reason: str, raw: Any) -> None:
            nonlocal bad_rows
            if mask.any():
                problems.append((mask, field, reason, raw))
                bad_rows = bad_rows | mask

        def column(name: str) -> pd.Series | np.ndarray:
            if name in frame.columns:
                return frame[name]
            return np.full(n, np.nan)  # a key no record of this batch carried

        X = np.empty((n, len(schema.feature_names)))
        pending: list[tuple[int, str, np.ndarray, list[str | None]]] = []
        for j, (name, kind) in enumerate(zip(schema.feature_names, schema.feature_kinds)):
            raw = column(name)
            if kind == "numeric":
                numbers, bad = parse_numbers(raw)
                report(bad, name, _REASON_NUMBER, raw)
                infinite = np.isinf(numbers)
                if infinite.any():
                    report(infinite, name, _REASON_FINITE, raw)
                X[:, j] = numbers
            else:
                codes, labels = factorize_labels(raw)
                pending.append((j, name, codes, labels))

        target = schema.target
        raw_target = column(target)
        if schema.task == "classification":
            target_codes, target_labels = factorize_labels(raw_target)
            if not scoring:
                report(target_codes < 0, target, _REASON_NO_TARGET, None)
        else:
            y_values, bad = parse_numbers(raw_target)
            infinite = np.isinf(y_values)
            if scoring:
                y_values = np.where(infinite, np.nan, y_values)
            else:
                report(bad, target, _REASON_NUMBER, raw_target)
                report(infinite, target, _REASON_FINITE, raw_target)
                report(np.isnan(y_values) & ~bad, target, _REASON_NO_TARGET, None)

        times = None
        if schema.time_field is not None:
            raw_time = column(schema.time_field)
            times, bad = parse_times(raw_time)
            report(bad, schema.time_field, _REASON_TIME, raw_time)

        keep = ~bad_rows
        for j, name, codes, labels in pending:
            mapped = self._books[name].encode(codes, labels, keep).astype(np.float64)
            mapped[mapped < 0] = np.nan
            X[:, j] = mapped
        if schema.task == "classification":
            y = self._classes.encode(target_codes, target_labels, keep)[keep].astype(np.int32)
        else:
            y = y_values[keep]

        ids = None
        if schema.id_field is not None:
            ids = label_texts(column(schema.id_field))[keep]

        self._count_unknown(frame)
        everything = not bad_rows.any()
        return EncodedBatch(
            X=X if everything else X[keep],
            y=y,
            lines=lines.copy() if everything else lines[keep],
            origin=batch.origin,
            times=times if times is None or everything else times[keep],
            ids=ids,
            rejects=list(batch.rejects) + self._rejects(batch.origin, lines, problems),
        )

    def _rejects(self, origin: str, lines: np.ndarray,
                 problems: list[tuple[np.ndarray, str, str, Any]]) -> list[Reject]:
        found: list[tuple[int, int, Reject]] = []
        for order, (mask, field, reason, raw) in enumerate(problems):
            values = None if raw is None else _as_array(raw)
            for row in np.flatnonzero(mask).tolist():
                value = None if values is None else str(values[row])[:_MAX_VALUE_CHARS]
                found.append((row, order, Reject(origin, int(lines[row]), field, value, reason)))
        found.sort(key=lambda item: item[:2])
        return [reject for _, _, reject in found]

    def _count_unknown(self, frame: pd.DataFrame) -> None:
        for name in frame.columns:
            if name not in self._known:
                present = int(np.count_nonzero(~missing_mask(frame[name])))
                self.unknown_fields[name] = self.unknown_fields.get(name, 0) + present

    # -- saving and restoring ----------------------------------------------------------

    def state_dict(self) -> dict:
        """Codebooks and counters as a JSON-able dict."""
        return {
            "format": _STATE_FORMAT,
            "version": _STATE_VERSION,
            "task": self.schema.task,
            "categories": self.categories,
            "classes": self.classes,
            "unknown_fields": dict(self.unknown_fields),
        }

    @classmethod
    def from_state(cls, schema: "Schema", state: dict) -> "Encoder":
        """Rebuild an encoder saved by :meth:`state_dict` for the same schema."""
        def fail(why: str) -> ModelFileError:
            return ModelFileError(f"saved encoder state does not fit the schema: {why}")

        if not isinstance(state, dict) or state.get("format") != _STATE_FORMAT:
            raise fail("it is not an encoder state")
        if state.get("version") != _STATE_VERSION:
            raise fail(f"version {state.get('version')!r}, expected {_STATE_VERSION}")
        if state.get("task") != schema.task:
            raise fail(f"task {state.get('task')!r}, the schema's is {schema.task!r}")
        encoder = cls(schema)
        categories = state.get("categories")
        if not isinstance(categories, dict) or set(categories) != set(encoder._books):
            expected = ", ".join(sorted(encoder._books)) or "none"
            raise fail(f"category fields differ (expected {expected})")
        for name, labels in categories.items():
            encoder._books[name] = _Codebook(_label_list(labels, fail, f"field {name!r}"))
        encoder._classes = _Codebook(_label_list(state.get("classes"), fail, "classes"))
        unknown = state.get("unknown_fields", {})
        if not isinstance(unknown, dict):
            raise fail("unknown_fields is not an object")
        encoder.unknown_fields = {str(k): int(v) for k, v in unknown.items()}
        return encoder


def _label_list(labels: Any, fail, what: str) -> list[str]:
    if not isinstance(labels, list) or not all(isinstance(x, str) for x in labels):
        raise fail(f"{what} is not a list of labels")
    if len(set(labels)) != len(labels):
        raise fail(f"{what} lists a label twice")
    return labels
