"""The value rules schema inference and encoding share: what is missing, what is a
number, a time or a label.

* Missing: ``None``, NaN and the text markers pandas' CSV reader treats as missing by
  default (``MISSING_MARKERS``). The same set applies to JSON strings, so "NA" means
  missing whichever format it came in.
* Numbers: what ``pandas.to_numeric`` accepts (``inf`` parses; the encoder refuses it).
* Labels (categories, classes, ids) are text. Numbers are printed canonically so one value
  read as ``1`` in one chunk and ``1.0`` (or the text ``"1.0"``) in another is the same
  label ``"1"``; booleans read as ``True``/``true``/``TRUE`` become ``"True"`` (likewise
  ``"False"``), the spellings pandas itself reads as booleans.
* Times: epoch seconds as numbers, or ISO-8601 text; text without an offset is UTC.

Limitation: integers beyond 2**53 that arrive as floats or mixed text lose digits in
their label.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

MISSING_MARKERS = frozenset({
    "", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
    "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null",
})
"""Text read as a missing value: pandas' default ``na_values`` of ``read_csv``."""


_TRUE_TEXT = frozenset({"True", "TRUE", "true"})


_FALSE_TEXT = frozenset({"False", "FALSE", "false"})


def as_array(values: Any) -> np.ndarray:
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
    arr = as_array(values)
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
    arr = as_array(values)
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
    arr = as_array(values)
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
    label (``1`` and ``"1.0"`` are both ``"1"``), so ``labels`` may repeat. Codes number
    the distinct values in the order they first appear (codebooks rely on it).

    Returns
    -------
    codes
        int64, index into ``labels`` for each value, -1 where missing.
    labels
        Canonical text per distinct raw value, ``None`` when that value means missing.
    """
    if isinstance(getattr(values, "dtype", None), pd.StringDtype):
        # pandas' text columns are numbered where they live (Arrow), without a Python
        # str per row: twice as fast as through an object array (measured, 1M rows)
        codes, uniques = pd.factorize(values)
        return _text_codes(codes, uniques)
    if isinstance(getattr(values, "dtype", None), pd.CategoricalDtype):
        # text the parser already numbered: only its categories are read as labels
        codes, uniques = pd.factorize(values)
        return _text_codes(codes, uniques.astype(object))
    arr = as_array(values)
    kind = arr.dtype.kind
    if kind == "b":
        codes, uniques = pd.factorize(arr)
        return codes.astype(np.int64), [str(bool(u)) for u in uniques]
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
    return _text_codes(codes, uniques)


def _text_codes(codes: np.ndarray, uniques: Any) -> tuple[np.ndarray, list[str | None]]:
    """:func:`factorize_labels` of text values from pandas' codes and uniques."""
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
