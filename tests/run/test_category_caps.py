"""Fields with ever more values: a cap per category field pools later new values into one
code, a cap on classes quarantines records that bring one class more, both said once.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami 1993) with its nominal
features joined into many-valued categories ("profile": car, zipcode, elevel, hyears,
up to 27,000 values; "model": car and zipcode, 180) and a record number as an
identifier; river's LED generator
(Breiman et al. 1984, 10 classes) for the class cap. Expected counts are computed here
from the records with pandas, independently of the encoder.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from river.datasets import synth

from connectors.base import RawBatch
from stream.errors import ConfigError
from stream.run.encoding import BEYOND_CLASS_CAP, OTHER_VALUES, Encoder
from stream.run.engine import LearnRun
from stream.run.job import LearnJob
from stream.run.schema import Field, Schema

CAP = 50


def agrawal_frame(n: int) -> pd.DataFrame:
    rows = []
    for i, (x, y) in enumerate(synth.Agrawal(classification_function=2, seed=5).take(n)):
        rows.append({"salary": x["salary"], "age": x["age"],
                     "profile": f"{x['car']}-{x['zipcode']}-{x['elevel']}-{x['hyears']}",
                     "model": f"{x['car']}-{x['zipcode']}",
                     "rid": f"r{i:06d}", "y": "high" if y else "low"})
    return pd.DataFrame(rows)


def rows_beyond(values: pd.Series, cap: int) -> int:
    """Rows whose value is not among the first ``cap`` distinct values (first seen)."""
    kept = set(pd.unique(values)[:cap])
    return int((~values.isin(kept)).sum())


def profile_schema() -> Schema:
    return Schema([Field("salary", "numeric"), Field("age", "numeric"),
                   Field("profile", "category"), Field("y", "target")], "y",
                  "classification")


def test_values_beyond_the_cap_share_one_code():
    frame = agrawal_frame(3_000)[["salary", "age", "profile", "y"]]
    encoder = Encoder(profile_schema(), category_cap=CAP)
    batches = [frame.iloc[i:i + 700].reset_index(drop=True) for i in range(0, 3_000, 700)]
    codes = np.concatenate([encoder.encode(RawBatch(b, "a.csv", np.arange(len(b)) + 2)).X[:, 2]
                            for b in batches])
    assert codes.max() == CAP and len(np.unique(codes)) == CAP + 1
    labels = encoder.categories["profile"]
    assert labels[-1] == OTHER_VALUES and len(labels) == CAP + 1
    assert labels[:CAP] == list(pd.unique(frame["profile"])[:CAP])
    assert int((codes == CAP).sum()) == rows_beyond(frame["profile"], CAP)
    pooled = encoder.pooled["profile"]
    assert pooled["records"] == rows_beyond(frame["profile"], CAP)
    assert pooled["first"] == pd.unique(frame["profile"])[CAP]
    # rows before the first pooled one: its position in the column
    assert pooled["after"] == int(np.flatnonzero(frame["profile"] == pooled["first"])[0])


def test_a_restored_encoder_pools_as_the_one_it_was_saved_from():
    frame = agrawal_frame(2_000)[["salary", "age", "profile", "y"]]
    first, rest = frame.iloc[:1_000].reset_index(drop=True), frame.iloc[1_000:]
    rest = rest.reset_index(drop=True)
    encoder = Encoder(profile_schema(), category_cap=CAP)
    encoder.encode(RawBatch(first, "a.csv", np.arange(1_000) + 2))
    state = json.loads(json.dumps(encoder.state_dict()))
    restored = Encoder.from_state(profile_schema(), state)
    lines = np.arange(1_000) + 1_002
    a = encoder.encode(RawBatch(rest, "a.csv", lines)).X
    b = restored.encode(RawBatch(rest, "a.csv", lines)).X
    np.testing.assert_array_equal(a, b)
    assert encoder.pooled == restored.pooled
    assert restored.category_cap == CAP


def test_tampered_pooled_facts_are_refused_with_a_message():
    state = Encoder(profile_schema(), category_cap=CAP).state_dict()
    state["pooled"] = {"profile": ["many", None, 0]}
    with pytest.raises(Exception, match="pooled values of field 'profile'"):
        Encoder.from_state(profile_schema(), state)
    state["pooled"] = {}
    state["category_cap"] = 2
    state["categories"] = {"profile": ["a", "b", "c"]}
    with pytest.raises(Exception, match="more values than its cap"):
        Encoder.from_state(profile_schema(), state)


@pytest.mark.parametrize("cap", [0, 10_001])
def test_caps_out_of_range_are_refused(cap):
    with pytest.raises(ConfigError, match="category cap"):
        LearnJob(sources=["a.csv"], target="y", category_cap=cap)


def write_csv(frame: pd.DataFrame, path: Path) -> Path:
    frame.to_csv(path, index=False)
    return path


def test_a_run_says_once_which_field_was_pooled_and_counts_it(tmp_path):
    frame = agrawal_frame(4_000)
    path = write_csv(frame[["salary", "age", "model", "y"]], tmp_path / "a.csv")
    warnings: list[str] = []
    summary = LearnRun(LearnJob(sources=[str(path)], target="y", category_cap=CAP,
                                batch_rows=1_000), warn=warnings.append).run()
    assert summary["pooled_values"]["model"]["records"] == rows_beyond(frame["model"], CAP)
    said = [w for w in warnings if "category cap" in w]
    assert len(said) == 1 and "field 'model' reached the category cap of 50" in said[0]
    assert OTHER_VALUES in said[0] and "raise --category-cap" in said[0]
    assert "identifier" not in said[0]   # 180 values repeat early: a category
    assert summary["learned"] == 4_000


def test_an_identifier_taken_for_a_category_is_named_as_one(tmp_path):
    frame = agrawal_frame(2_000)
    path = write_csv(frame[["salary", "age", "rid", "y"]].rename(columns={"rid": "ref"}),
                     tmp_path / "a.csv")
    warnings: list[str] = []
    summary = LearnRun(LearnJob(sources=[str(path)], target="y", category_cap=CAP,
                                declared={"ref": "category"}), warn=warnings.append).run()
    assert summary["pooled_values"]["ref"]["records"] == 2_000 - CAP
    said = [w for w in warnings if "category cap" in w]
    assert len(said) == 1 and "looks like an identifier" in said[0]
    assert "--kind ref=id" in said[0] and "--kind ref=ignore" in said[0]


def led_frame(n: int) -> pd.DataFrame:
    rows = [{**{f"s{k}": int(v) for k, v in x.items()}, "digit": f"d{y}"}
            for x, y in synth.LED(seed=11, noise_percentage=0.1).take(n)]
    return pd.DataFrame(rows)


def test_records_with_classes_beyond_the_cap_are_quarantined_once_said(tmp_path):
    frame = led_frame(2_000)
    path = write_csv(frame, tmp_path / "led.csv")
    quarantine = tmp_path / "q.jsonl"
    warnings: list[str] = []
    summary = LearnRun(LearnJob(sources=[str(path)], target="digit", class_cap=4,
                                quarantine_path=str(quarantine)),
                       warn=warnings.append).run()
    beyond = rows_beyond(frame["digit"], 4)
    assert summary["beyond_class_cap"] == beyond
    assert summary["learned"] == 2_000 - beyond
    assert sorted(summary["classes"]) == sorted(pd.unique(frame["digit"])[:4])
    entries = [json.loads(line) for line in quarantine.read_text().splitlines()]
    assert len(entries) == beyond and all(BEYOND_CLASS_CAP in e["reason"] for e in entries)
    said = [w for w in warnings if "class cap" in w]
    assert len(said) == 1 and "--task regression" in said[0]


def test_scoring_reads_a_class_beyond_the_cap_as_unknown():
    schema = Schema([Field("x", "numeric"), Field("y", "target")], "y", "classification")
    encoder = Encoder(schema, class_cap=2)
    frame = pd.DataFrame({"x": [1.0, 2.0, 3.0], "y": ["a", "b", "c"]})
    batch = encoder.encode(RawBatch(frame, "s.csv", np.arange(3) + 2), scoring=True)
    assert batch.y.tolist() == [0, 1, -1] and not batch.rejects
