"""Schema: kinds, the JSON file, inference from a prefix, and the exact error messages.

Outside references: river's bundled datasets (phishing, chick weights, water flow, S&P 500)
read through our own source; ISO 8601 for time values.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pandas as pd
import pytest
import river

from connectors import open_sources
from stream.errors import ConfigError, SchemaError
from stream.run.schema import Field, Schema, infer_schema, load_schema, save_schema

RIVER_DATA = os.path.join(os.path.dirname(river.__file__), "datasets")


def prefix(name: str, rows: int = 1000) -> pd.DataFrame:
    frames, have = [], 0
    for batch in open_sources([os.path.join(RIVER_DATA, name)], batch_rows=256).batches():
        frames.append(batch.frame)
        have += len(batch)
        if have >= rows:
            break
    return pd.concat(frames, ignore_index=True).head(rows)


def kinds(schema: Schema) -> dict[str, str]:
    return {f.name: f.kind for f in schema.fields}


SCHEMA = Schema((Field("ts", "time"), Field("unit_id", "id"), Field("temp", "numeric"),
                 Field("mode", "category"), Field("note", "ignore"), Field("fault", "target")),
                target="fault", task="classification")


def test_properties_follow_file_order():
    assert SCHEMA.feature_names == ["temp", "mode"]
    assert SCHEMA.feature_kinds == ["numeric", "category"]
    assert SCHEMA.id_field == "unit_id" and SCHEMA.time_field == "ts"
    assert SCHEMA.names == ["ts", "unit_id", "temp", "mode", "note", "fault"]


def test_round_trip_dict_and_file(tmp_path):
    assert Schema.from_dict(SCHEMA.to_dict()) == SCHEMA
    path = tmp_path / "schema.json"
    save_schema(SCHEMA, str(path))
    assert load_schema(str(path)) == SCHEMA
    data = json.loads(path.read_text())
    assert data == {"target": "fault", "task": "classification", "fields": [
        {"name": "ts", "kind": "time"}, {"name": "unit_id", "kind": "id"},
        {"name": "temp", "kind": "numeric"}, {"name": "mode", "kind": "category"},
        {"name": "note", "kind": "ignore"}, {"name": "fault", "kind": "target"}]}
    assert [p.name for p in tmp_path.iterdir()] == ["schema.json"]  # no temp file left


@pytest.mark.parametrize("build, message", [
    (lambda: Field("x", "text"), "kind of field 'x' must be one of numeric, category, target, "
                                 "id, time, ignore, got 'text'"),
    (lambda: Schema((Field("a", "numeric"), Field("y", "target")), "y", "ranking"),
     "task must be one of classification, regression, got 'ranking'"),
    (lambda: Schema((Field("a", "numeric"), Field("b", "numeric")), "y", "regression"),
     "target 'y' is not a field; fields are: a, b"),
    (lambda: Schema((Field("a", "numeric"), Field("a", "target")), "a", "regression"),
     "field 'a' is listed twice"),
    (lambda: Schema((Field("a", "numeric"), Field("y", "numeric")), "y", "regression"),
     "field 'y' has kind 'numeric' but the target is 'y'; only the target has kind "
     "'target'"),
    (lambda: Schema((Field("t", "time"), Field("u", "time"), Field("a", "numeric"),
                     Field("y", "target")), "y", "regression"),
     "only one field may be of kind 'time', got t, u"),
    (lambda: Schema((Field("t", "time"), Field("y", "target")), "y", "regression"),
     "no features left: every field other than the target is id, time or ignore"),
])
def test_schema_errors(build, message):
    with pytest.raises(SchemaError) as err:
        build()
    assert str(err.value) == message


def test_file_errors(tmp_path):
    missing = str(tmp_path / "none.json")
    with pytest.raises(ConfigError) as err:
        load_schema(missing)
    assert str(err.value) == f"cannot read schema {missing!r}: No such file or directory"
    bad = tmp_path / "bad.json"
    bad.write_text('{"target": "y",,}')
    with pytest.raises(SchemaError, match=r"is not valid JSON: Expecting property name "
                                          r"enclosed in double quotes at line 1, column 16"):
        load_schema(str(bad))
    odd = tmp_path / "odd.json"
    odd.write_text(json.dumps({**SCHEMA.to_dict(), "version": 2}))
    with pytest.raises(SchemaError) as err:
        load_schema(str(odd))
    assert str(err.value) == (f"schema {str(odd)!r}: schema has an unknown key 'version'; "
                              "known: fields, target, task")
    with pytest.raises(SchemaError, match="'fields' must be a list"):
        Schema.from_dict({"target": "y", "task": "regression", "fields": ["y"]})


# --- inference -----------------------------------------------------------------------

def test_inference_kinds():
    frame = pd.DataFrame({
        "unit_id": [f"u{i}" for i in range(10)],          # id: by name, all distinct
        "site_id": ["a", "b"] * 5,                          # a second id-named field: ignore
        "timestamp": ["2024-05-01T10:00:00Z"] * 10,         # time by name
        "logged": ["2024-05-01 10:00:%02d" % i for i in range(10)],  # ISO but 2nd time
        "temp": ["1.5", "NA", "2", "", "3e2", "-4", "5", "6", "7", "8"],
        "mode": ["on", "off", "1", "on", "on", "off", "on", "on", "on", "on"],
        "flag": [True, False] * 5,
        "empty": [np.nan] * 10,
        "fault": ["yes", "no"] * 5,
    })
    before = frame.copy()
    schema = infer_schema(frame, "fault")
    pd.testing.assert_frame_equal(frame, before)  # input not mutated
    assert kinds(schema) == {
        "unit_id": "id", "site_id": "ignore", "timestamp": "time", "logged": "ignore",
        "temp": "numeric", "mode": "category", "flag": "category", "empty": "numeric",
        "fault": "target"}
    assert schema.task == "classification"


def test_declared_kinds_win():
    frame = pd.DataFrame({"code": [1, 2, 3], "id": ["a", "b", "c"], "y": [0.5, 1.5, 2.5]})
    schema = infer_schema(frame, "y", declared={"code": "category", "id": "ignore"})
    assert kinds(schema) == {"code": "category", "id": "ignore", "y": "target"}
    assert schema.task == "regression"


@pytest.mark.parametrize("values, task", [
    (["ok", "fault", "ok"], "classification"),
    ([True, False, True], "classification"),
    (["TRUE", "false", "True"], "classification"),
    ([1.0, 0.0, 1.0, np.nan], "classification"),          # integer valued, 2 distinct
    (list(range(20)), "classification"),                  # 20 distinct integers
    (list(range(21)), "regression"),                      # 21 distinct integers
    ([0.5, 1.25, 3.0], "regression"),
    (["1.5", "2.5", "NA"], "regression"),
])
def test_task_from_target_values(values, task):
    frame = pd.DataFrame({"x": range(len(values)), "y": values})
    assert infer_schema(frame, "y").task == task


@pytest.mark.parametrize("call, message", [
    (lambda f: infer_schema(f, "z"), "target 'z' is not a field; fields are: a, b, y"),
    (lambda f: infer_schema(f, "y", declared={"c": "numeric"}),
     "declared field 'c' is not a field; fields are: a, b, y"),
    (lambda f: infer_schema(f, "y", declared={"a": "ignore", "b": "id"}),
     "no features left: every field other than the target is id, time or ignore"),
    (lambda f: infer_schema(f, "y", declared={"y": "numeric"}),
     "field 'y' is the target; it cannot be declared 'numeric'"),
    (lambda f: infer_schema(f, "y", declared={"a": "target"}),
     "field 'a' is declared as the target but the target is 'y'"),
    (lambda f: infer_schema(f, "y", declared={"a": "float"}),
     "kind of field 'a' must be one of numeric, category, target, id, time, ignore, "
     "got 'float'"),
    (lambda f: infer_schema(f, "b", task="regression"),
     "target 'b' has values that are not numbers (e.g. 'p'); regression needs numbers"),
    (lambda f: infer_schema(f.assign(y=np.nan), "y"),
     "target 'y' has no value in the first 2 records; give the task"),
])
def test_inference_errors(call, message):
    frame = pd.DataFrame({"a": [1, 2], "b": ["p", "q"], "y": [0, 1]})
    with pytest.raises(SchemaError) as err:
        call(frame)
    assert str(err.value) == message


def test_river_phishing_is_classification_over_its_nine_features():
    # river's Phishing dataset: nine numeric features and the 0/1 label is_phishing
    schema = infer_schema(prefix("phishing.csv.gz"), "is_phishing")
    assert schema.task == "classification"
    assert schema.feature_kinds == ["numeric"] * 9


def test_river_chick_weights_time_by_name_and_regression():
    # chick-weights: weight (integer grams, many values) by time (days), chick, diet
    schema = infer_schema(prefix("chick-weights.csv"), "weight")
    assert kinds(schema) == {"weight": "target", "time": "time", "chick": "numeric",
                             "diet": "numeric"}
    assert schema.task == "regression"


def test_river_water_flow_and_sp500_times_from_iso_8601_values():
    # water-flow: ISO 8601 times with offsets and one value column, nothing to learn from
    frame = prefix("water-flow.csv")
    with pytest.raises(SchemaError, match="no features left"):
        infer_schema(frame, "Water flow [l/s]")
    frame["previous"] = frame["Water flow [l/s]"].shift()
    schema = infer_schema(frame, "Water flow [l/s]")
    assert schema.time_field == "Time" and schema.task == "regression"
    # "date" holds ISO 8601 calendar dates (YYYY-MM-DD)
    schema = infer_schema(prefix("sp500.csv.gz"), "next_day_return")
    assert schema.time_field == "date" and len(schema.feature_names) == 10


def test_iso_dates_without_a_time_name_are_found_by_value():
    frame = pd.DataFrame({"when": ["2024-01-05", "2024-01-06T07:08:09+02:00"],
                          "odd": ["2024-13-45", "x"], "y": [1.5, 2.5]})
    assert kinds(infer_schema(frame, "y")) == {"when": "time", "odd": "category",
                                               "y": "target"}
