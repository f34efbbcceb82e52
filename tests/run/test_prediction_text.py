"""The predictions writers against pandas' own ``DataFrame.to_csv`` and ``to_json`` (the
reference: the file must be byte for byte what pandas writes)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from stream.run.prediction_text import csv_text, json_lines_text

_TEXT = st.text(alphabet=st.sampled_from(list('ab,"\n\r \t\u00e9xR0/\\\u2028{}:')), max_size=6)
_FLOATS = st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from(
    [0.0, -0.0, 1.0, 0.5, 1e-7, 1e16, 0.1 + 0.2, 5e-324, 0.833333])


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 12).flatmap(lambda n: st.tuples(
    st.lists(_TEXT, min_size=n, max_size=n),
    st.lists(st.integers(-2**62, 2**62), min_size=n, max_size=n),
    st.lists(_FLOATS, min_size=n, max_size=n),
    st.lists(_TEXT, min_size=n, max_size=n))), st.booleans(), _TEXT)
def test_prediction_rows_are_the_bytes_pandas_writes(columns, header, name):
    text, ints, floats, more = columns
    frame = pd.DataFrame({"origin": np.array(text, dtype=object),
                          "line": np.array(ints, dtype=np.int64),
                          "confidence": np.array(floats, dtype=np.float64),
                          name or "rule": np.array(more, dtype=object)})
    assert csv_text(frame, header) == frame.to_csv(index=False, header=header)
    inferred = pd.DataFrame({"origin": "tel", "line": ints, "predicted": text,
                             "confidence": floats})   # pandas picks the dtypes
    assert csv_text(inferred, header) == inferred.to_csv(index=False, header=header)


def test_columns_it_does_not_format_are_left_to_pandas():
    assert csv_text(pd.DataFrame({"a": [True], "b": ["x"]}), True) is None
    assert csv_text(pd.DataFrame({"a": ["x", None], "b": [1, 2]}), True) is None
    assert csv_text(pd.DataFrame({"a": [""]}), False) is None       # one column


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 12).flatmap(lambda n: st.tuples(
    st.lists(_TEXT, min_size=n, max_size=n),
    st.lists(st.integers(-2**62, 2**62), min_size=n, max_size=n),
    st.lists(_FLOATS, min_size=n, max_size=n))), _TEXT)
def test_prediction_json_lines_are_the_bytes_pandas_writes(columns, name):
    text, ints, floats = columns
    frame = pd.DataFrame({"origin": "tel/1", "line": np.array(ints, dtype=np.int64),
                          "predicted": np.array(text, dtype=object),
                          "confidence": np.array(floats, dtype=np.float64),
                          name or "rule": np.array(text[::-1], dtype=object)})
    if not len(frame):
        assert json_lines_text(frame) is None      # the writer writes nothing then
        return
    expected = frame.to_json(orient="records", lines=True)
    if not expected.endswith("\n"):
        expected += "\n"                           # as PredictionFile writes it
    assert json_lines_text(frame) == expected


def test_json_columns_it_does_not_format_are_left_to_pandas():
    assert json_lines_text(pd.DataFrame({"a": [True]})) is None
    many = pd.DataFrame({"id": [f"r{i}" for i in range(2001)]})
    assert json_lines_text(many) is None
