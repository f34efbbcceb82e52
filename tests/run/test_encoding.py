"""Encoder: raw batches -> X / y / lines, with every bad value named.

Outside references: river's bundled Phishing and water-flow datasets (river's own loader
gives the label counts), pandas.to_numeric (what a number is), Python's datetime (ISO 8601
to epoch seconds).
"""

from __future__ import annotations

import datetime as dt
import io
import json
import os

import numpy as np
import pandas as pd
import pytest
import river
from hypothesis import given, settings
from hypothesis import strategies as st

from connectors import RawBatch, Reject, open_sources
from stream.errors import ModelFileError
from stream.run.encoding import Encoder
from stream.run.schema import Field, Schema, infer_schema
from stream.run.values import MISSING_MARKERS, parse_numbers
from stream.run.values import factorize_labels

RIVER_DATA = os.path.join(os.path.dirname(river.__file__), "datasets")

SCHEMA = Schema((Field("ts", "time"), Field("unit", "id"), Field("temp", "numeric"),
                 Field("mode", "category"), Field("note", "ignore"), Field("fault", "target")),
                target="fault", task="classification")


def batch(rows: dict, lines=None, origin="data.csv", rejects=()) -> RawBatch:
    frame = pd.DataFrame(rows)
    lines = np.arange(2, len(frame) + 2) if lines is None else np.asarray(lines)
    return RawBatch(frame, origin, lines.astype(np.int64), list(rejects))


def test_missing_markers_are_pandas_defaults():
    # the same set pandas.read_csv treats as missing (the reference)
    assert MISSING_MARKERS == frozenset(pd._libs.parsers.STR_NA_VALUES)


def test_encodes_features_target_time_and_ids():
    raw = batch({
        "ts": ["2024-05-01T10:00:00Z", "2024-05-01T12:00:00+02:00", 1714557600.5, None],
        "unit": ["u1", 7, None, "u4"],
        "temp": [1.5, "2", None, "NA"],
        "mode": ["on", "off", None, "on"],
        "note": ["x", "y", "z", "w"],
        "fault": ["no", "yes", "no", "maybe"],
    })
    out = Encoder(SCHEMA).encode(raw)
    assert out.X.dtype == np.float64 and out.X.flags.c_contiguous
    np.testing.assert_array_equal(out.X, [[1.5, 0], [2, 1], [np.nan, np.nan], [np.nan, 0]])
    assert out.y.dtype == np.int32 and out.y.tolist() == [0, 1, 0, 2]
    assert out.lines.tolist() == [2, 3, 4, 5] and out.origin == "data.csv"
    assert out.ids.tolist() == ["u1", "7", "", "u4"]
    # epoch seconds of the ISO 8601 texts, by Python's datetime (the reference)
    expected = dt.datetime.fromisoformat("2024-05-01T10:00:00+00:00").timestamp()
    assert out.times[0] == out.times[1] == expected
    assert out.times[2] == 1714557600.5 and np.isnan(out.times[3])
    assert out.rejects == []


def test_bad_values_are_named_and_their_rows_removed():
    raw = batch({"ts": [1.0, "yesterday", 3.0, 4.0, 5.0],
                 "unit": ["a", "b", "c", "d", "e"],
                 "temp": ["1", "2", "abc", "inf", "5"],
                 "mode": ["m1", "m2", "m3", "m4", "m5"],
                 "note": [None] * 5,
                 "fault": ["ok", "ok", "ok", "bad", None]},
                rejects=[Reject("data.csv", 9, None, "1,2", "has 2 fields, expected 6")])
    encoder = Encoder(SCHEMA)
    out = encoder.encode(raw)
    assert out.lines.tolist() == [2] and out.X.tolist() == [[1.0, 0.0]]
    assert [r.message() for r in out.rejects] == [
        "data.csv line 9: '1,2' has 2 fields, expected 6",
        "data.csv line 3, field 'ts': 'yesterday' is not a time",
        "data.csv line 4, field 'temp': 'abc' is not a number",
        "data.csv line 5, field 'temp': 'inf' is not a finite number",
        "data.csv line 6, field 'fault': has no target value",
    ]
    # rejected rows give no codes: only the kept row's category and class exist
    assert encoder.categories == {"mode": ["m1"]} and encoder.classes == ["ok"]


def test_regression_target():
    schema = Schema((Field("x", "numeric"), Field("y", "target")), "y", "regression")
    out = Encoder(schema).encode(batch({"x": [1, 2, 3, 4], "y": ["1.5", "NA", "x", 2]}))
    assert out.y.dtype == np.float64 and out.y.tolist() == [1.5, 2.0]
    assert [(r.line, r.field, r.value, r.reason) for r in out.rejects] == [
        (3, "y", None, "has no target value"), (4, "y", "x", "is not a number")]
    assert out.times is None and out.ids is None


def test_scoring_keeps_records_without_a_usable_target():
    classify = Schema((Field("x", "numeric"), Field("y", "target")), "y", "classification")
    encoder = Encoder(classify)
    encoder.encode(batch({"x": [1, 2], "y": ["a", "b"]}))
    out = encoder.encode(batch({"x": [3, "bad", 5], "y": [None, "b", "NA"]}), scoring=True)
    assert out.y.tolist() == [-1, -1] and out.lines.tolist() == [2, 4]
    assert [(r.field, r.reason) for r in out.rejects] == [("x", "is not a number")]
    regress = Schema((Field("x", "numeric"), Field("y", "target")), "y", "regression")
    out = Encoder(regress).encode(batch({"x": [1, 2, 3], "y": ["1.5", "?", "inf"]}),
                                  scoring=True)
    assert out.y[0] == 1.5 and np.isnan(out.y[1:]).all() and out.rejects == []


def test_numbers_are_what_pandas_to_numeric_reads():
    texts = ["1", " 2 ", "3.5e2", "-0", "0x10", "1_000", "1,5", "nan", "NULL", "", "abc"]
    numbers, bad = parse_numbers(np.array(texts, dtype=object))
    reference = pd.to_numeric(pd.Series(texts), errors="coerce").to_numpy()
    present = ~np.isin(texts, list(MISSING_MARKERS))
    np.testing.assert_array_equal(numbers[present], reference[present])
    assert bad.tolist() == [False, False, False, False, True, True, True, False, False,
                            False, True]


def test_labels_agree_across_the_forms_one_value_takes():
    # 1 read as int, as float (a column with NaN), and as text in a column with garbage
    codes_a, labels_a = factorize_labels(pd.Series([1, 2]))
    codes_b, labels_b = factorize_labels(pd.Series([1.0, np.nan, 2.5]))
    codes_c, labels_c = factorize_labels(pd.Series(["1.0", "x", "NA", "TRUE", True, 1]))
    assert [labels_a[c] for c in codes_a] == ["1", "2"]
    assert [labels_b[c] if c >= 0 else None for c in codes_b] == ["1", None, "2.5"]
    assert [labels_c[c] if c >= 0 else None for c in codes_c] == [
        "1", "x", None, "True", "True", "1"]


_TOKEN = st.one_of(
    st.sampled_from(["a", "B", "NA", "", "n/a", "null", "x1", "1", "1.0", "01", "-0", "2.50",
                     "1e3", "True", "true", "FALSE", "yes", "inf", "-inf", "é", "a b"]),
    st.integers(-10**6, 10**6).map(str),
    st.floats(-1e6, 1e6, allow_nan=False).map(repr),
    st.decimals(-1000, 1000, places=6, allow_nan=False).map(str))


@settings(max_examples=80, deadline=None)
@given(column=st.lists(_TOKEN, min_size=1, max_size=60))
def test_labels_are_the_same_when_the_parser_hands_text_already_numbered(column):
    # the reader may parse label columns straight into pandas Categoricals (dtype
    # "category"); each record must get the label pandas' default parse of the same
    # CSV gives (reference: pandas.read_csv's own type inference)
    text = "c,pad\n" + "".join(f"{token},0\n" for token in column)
    default = pd.read_csv(io.StringIO(text))["c"]
    numbered = pd.read_csv(io.StringIO(text), dtype={"c": "category"})["c"]
    assert isinstance(numbered.dtype, pd.CategoricalDtype)

    def per_record(values):
        codes, labels = factorize_labels(values)
        return [labels[c] if c >= 0 else None for c in codes]

    assert per_record(numbered) == per_record(default)


def test_new_categories_and_classes_mid_stream_get_new_codes():
    schema = Schema((Field("mode", "category"), Field("y", "target")), "y", "classification")
    encoder = Encoder(schema)
    first = encoder.encode(batch({"mode": ["a", "b"], "y": [1, 0]}))
    second = encoder.encode(batch({"mode": ["c", "a", np.nan], "y": [1.0, 2.0, 0.0]}))
    assert first.X[:, 0].tolist() == [0, 1] and first.y.tolist() == [0, 1]
    assert second.X[:2, 0].tolist() == [2, 0] and np.isnan(second.X[2, 0])
    assert second.y.tolist() == [0, 2, 1]
    assert encoder.classes == ["1", "0", "2"]
    assert encoder.categories == {"mode": ["a", "b", "c"]}


def test_a_feature_absent_from_a_batch_is_missing_and_unknown_fields_are_counted():
    schema = Schema((Field("a", "numeric"), Field("b", "category"), Field("y", "target")),
                    "y", "regression")
    encoder = Encoder(schema)
    out = encoder.encode(batch({"y": [1.0, 2.0], "extra": ["x", None], "more": [1, 2]}))
    assert np.isnan(out.X).all() and out.X.shape == (2, 2)
    encoder.encode(batch({"y": [1.0], "extra": ["z"]}))
    assert encoder.unknown_fields == {"extra": 2, "more": 2}


def test_empty_batch():
    out = Encoder(SCHEMA).encode(batch({c: [] for c in SCHEMA.names}))
    assert out.X.shape == (0, 2) and out.y.shape == (0,) and out.rejects == []


def test_input_is_not_mutated():
    raw = batch({"ts": [1.0, 2.0], "unit": ["a", "b"], "temp": ["1", "x"],
                 "mode": ["m", None], "note": [1, 2], "fault": ["p", "q"]})
    frame, lines = raw.frame.copy(deep=True), raw.lines.copy()
    Encoder(SCHEMA).encode(raw)
    pd.testing.assert_frame_equal(raw.frame, frame)
    np.testing.assert_array_equal(raw.lines, lines)


def test_numeric_code_runs_clean_under_errstate():
    raw = batch({"ts": [1.0, "x"], "unit": ["a", None], "temp": [np.inf, "1e400"],
                 "mode": [None, "m"], "note": [1, 2], "fault": [np.nan, "p"]})
    with np.errstate(all="raise"):
        Encoder(SCHEMA).encode(raw)


def test_state_round_trip_through_json_encodes_identically():
    encoder = Encoder(SCHEMA)
    encoder.encode(batch({"ts": [1, 2], "unit": ["a", "b"], "temp": [1, 2],
                          "mode": ["x", "y"], "note": [0, 0], "fault": ["p", "q"],
                          "stray": [1, 1]}))
    state = json.loads(json.dumps(encoder.state_dict()))
    restored = Encoder.from_state(SCHEMA, state)
    assert restored.categories == encoder.categories and restored.classes == encoder.classes
    assert restored.unknown_fields == {"stray": 2}
    later = batch({"ts": [3, 4], "unit": ["c", "d"], "temp": [3, 4], "mode": ["z", "x"],
                   "note": [0, 0], "fault": ["r", "p"]})
    a, b = encoder.encode(later), restored.encode(later)
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)


@pytest.mark.parametrize("change, message", [
    (lambda s: s.update(format="other"), "it is not an encoder state"),
    (lambda s: s.update(version=9), "version 9, expected 1"),
    (lambda s: s.update(task="regression"), "task 'regression', the schema's is "
                                            "'classification'"),
    (lambda s: s.update(categories={}), "category fields differ (expected mode)"),
    (lambda s: s.update(classes=["a", "a"]), "classes lists a label twice"),
    (lambda s: s["categories"].update(mode=[1]), "field 'mode' is not a list of labels"),
])
def test_state_errors(change, message):
    state = Encoder(SCHEMA).state_dict()
    change(state)
    with pytest.raises(ModelFileError) as err:
        Encoder.from_state(SCHEMA, state)
    assert str(err.value) == f"saved encoder state does not fit the schema: {message}"


# --- property: one batch or many, the same numbers --------------------------------------

_value = st.one_of(st.none(), st.integers(-3, 3), st.floats(-5, 5, allow_nan=False),
                   st.sampled_from(["a", "b", "NA", "", "x1", "1.0", "True", "true", "1"]))


@settings(max_examples=60, deadline=None)
@given(rows=st.lists(st.tuples(_value, _value, _value), min_size=1, max_size=40),
       cuts=st.lists(st.integers(0, 40), max_size=6))
def test_one_batch_or_many_gives_the_same_encoding(rows, cuts):
    schema = Schema((Field("n", "numeric"), Field("c", "category"), Field("y", "target")),
                    "y", "classification")
    frame = pd.DataFrame(rows, columns=["n", "c", "y"], dtype=object)
    lines = np.arange(2, len(frame) + 2)
    whole = Encoder(schema).encode(RawBatch(frame, "f", lines))
    split = Encoder(schema)
    bounds = sorted({0, len(frame), *[c for c in cuts if c < len(frame)]})
    parts = [split.encode(RawBatch(frame.iloc[a:b].reset_index(drop=True), "f", lines[a:b]))
             for a, b in zip(bounds, bounds[1:])]
    np.testing.assert_array_equal(whole.X, np.concatenate([p.X for p in parts]))
    np.testing.assert_array_equal(whole.y, np.concatenate([p.y for p in parts]))
    np.testing.assert_array_equal(whole.lines, np.concatenate([p.lines for p in parts]))
    assert whole.rejects == [r for p in parts for r in p.rejects]


# --- river's real datasets --------------------------------------------------------------

def test_river_phishing_label_counts_match_rivers_loader():
    from river import datasets

    path = os.path.join(RIVER_DATA, "phishing.csv.gz")
    batches = list(open_sources([path], batch_rows=300).batches())
    schema = infer_schema(batches[0].frame, "is_phishing")
    encoder = Encoder(schema)
    y = np.concatenate([encoder.encode(b).y for b in batches])
    positives = sum(1 for _, label in datasets.Phishing() if label)
    assert len(y) == 1250 and int(np.sum(y == encoder.classes.index("1"))) == positives


def test_river_water_flow_times_are_epoch_seconds():
    path = os.path.join(RIVER_DATA, "water-flow.csv")
    frame = next(open_sources([path]).batches()).frame
    schema = Schema((Field("Time", "time"), Field("lag", "numeric"),
                     Field("Water flow [l/s]", "target")), "Water flow [l/s]", "regression")
    out = Encoder(schema).encode(RawBatch(frame, path, np.arange(2, len(frame) + 2)))
    first = dt.datetime.fromisoformat(frame["Time"][0]).timestamp()
    assert out.times[0] == first and np.all(np.diff(out.times) > 0)
