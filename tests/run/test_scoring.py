"""Scoring with a saved model (stream/scoring.py, ``sapwood score``).

What is checked, and against what:

* ``sapwood score MODEL SOURCE`` writes exactly what ``TreeClassifier.predict`` gives for
  the saved state on records the test encodes itself with the saved code books (class,
  confidence to the 6 decimals written, and the rule that fired);
* the target column is optional; where present, the accuracy in the report equals the
  share of predictions matching the labels, counted here;
* bad records go to the quarantine file; a record without a label is still predicted.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993; elevel, car and
zipcode nominal per river's docs, written as text labels) with values blanked out at
random (fixed seed), and a few category labels the learner never saw.
"""

from __future__ import annotations

import csv
import itertools
import json
import math
import random
from pathlib import Path

import numpy as np
import pytest
from river.datasets import synth

from stream.classify.settings import TreeSettings
from stream.cli.main import main
from stream.rules.rule import rule_id
from stream.rules.text import CAUTION
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.saved_model import load_model

AGRAWAL_KEYS = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue",
                "hyears", "loan")
NOMINAL_PREFIX = {"elevel": "e", "car": "car", "zipcode": "z"}  # nominal in river's docs
MISSING_TEXT = ("", "NA")


def agrawal_rows(n: int, seed: int, function: int, missing: float,
                 new_categories: float = 0.0) -> list[list[str]]:
    rng = random.Random(seed)
    rows = []
    for x, y in itertools.islice(synth.Agrawal(classification_function=function, seed=seed), n):
        row = []
        for k in AGRAWAL_KEYS:
            if rng.random() < missing:
                row.append(rng.choice(MISSING_TEXT))
            elif k in NOMINAL_PREFIX:
                unseen = rng.random() < new_categories
                row.append(f"{NOMINAL_PREFIX[k]}{90 + x[k] if unseen else x[k]}")
            else:
                row.append(repr(float(x[k])))
        rows.append(row + [str(y)])
    return rows


def write_csv(path: Path, rows: list[list[str]], with_target: bool = True) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(list(AGRAWAL_KEYS) + (["group"] if with_target else []))
        writer.writerows(row if with_target else row[:-1] for row in rows)
    return path


def encode_features(rows: list[list[str]], books: dict[str, list[str]]) -> np.ndarray:
    """Features by hand: floats, NaN for missing, category codes from ``books`` (labels
    not in a book get the next codes, in first-seen order)."""
    books = {k: list(v) for k, v in books.items()}
    X = np.empty((len(rows), len(AGRAWAL_KEYS)))
    for i, row in enumerate(rows):
        for j, (key, raw) in enumerate(zip(AGRAWAL_KEYS, row[:len(AGRAWAL_KEYS)], strict=True)):
            if raw in MISSING_TEXT:
                X[i, j] = math.nan
            elif key in NOMINAL_PREFIX:
                if raw not in books[key]:
                    books[key].append(raw)
                X[i, j] = books[key].index(raw)
            else:
                X[i, j] = float(raw)
    return X


def read_jsonl(path: Path) -> list[dict]:
    # blank lines are skipped here; tests/run/test_engine.py checks the files have none
    return [json.loads(line) for line in Path(path).read_text().splitlines() if line.strip()]


def run_main(args, capsys) -> tuple[int, str, str]:
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in args])
    out, err = capsys.readouterr()
    if stop.value.code == 0 and args[0] == "score":
        # the report, then the caution that ends every output of rules for people
        report, caution = err.rstrip("\n").rsplit("\n", 1)
        assert caution == CAUTION
        err = report + "\n"
    return stop.value.code, out, err


@pytest.fixture(scope="module")
def fresh(tmp_path_factory) -> tuple[Path, list[list[str]]]:
    where = tmp_path_factory.mktemp("score")
    rows = agrawal_rows(5_000, seed=21, function=4, missing=0.04, new_categories=0.02)
    return where, rows


@pytest.fixture(scope="module", params=["majority", "naive_bayes", "adaptive"])
def model(request, tmp_path_factory) -> Path:
    where = tmp_path_factory.mktemp(f"model-{request.param}")
    train = write_csv(where / "train.csv",
                      agrawal_rows(12_000, seed=20, function=4, missing=0.02))
    run_learn(LearnJob(sources=[str(train)], target="group",
                       settings=TreeSettings(leaf_model=request.param),
                       save_path=str(where / "model.sapwood")))
    return where / "model.sapwood"


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # the default quarantine file is relative


def test_score_writes_what_the_saved_tree_predicts(model, fresh, tmp_path, capsys):
    _, rows = fresh
    source = write_csv(tmp_path / "fresh.csv", rows)
    code, _, err = run_main(["score", model, source, "--predictions", "p.jsonl"], capsys)
    assert code == 0, err
    written = read_jsonl(tmp_path / "p.jsonl")
    saved = load_model(str(model))
    with np.errstate(all="raise"):
        expected = saved.model.predict(encode_features(rows, saved.encoder.categories))
    assert len(written) == len(rows)
    labels = saved.model.classes_
    for i, row in enumerate(written):
        assert row["line"] == i + 2
        assert row["predicted"] == (labels[expected.pred[i]] if expected.pred[i] >= 0 else "")
        assert row["confidence"] == round(float(expected.confidence[i]), 6)
        assert row["rule"] == rule_id(expected.leaf[i])
    assert len({row["rule"] for row in written}) > 1


def test_score_without_the_target_column(model, fresh, tmp_path, capsys):
    _, rows = fresh
    with_target = write_csv(tmp_path / "with.csv", rows)
    without = write_csv(tmp_path / "without.csv", rows, with_target=False)
    code, _, err = run_main(["score", model, without, "--predictions", "a.jsonl"], capsys)
    assert code == 0, err
    assert err.strip() == "sapwood: scored 5,000 records"
    run_main(["score", model, with_target, "--predictions", "b.jsonl"], capsys)
    a, b = read_jsonl(tmp_path / "a.jsonl"), read_jsonl(tmp_path / "b.jsonl")
    assert [{**row, "origin": None} for row in a] == [{**row, "origin": None} for row in b]


def test_reported_accuracy_is_the_share_of_matching_labels(model, fresh, tmp_path, capsys):
    _, rows = fresh
    source = write_csv(tmp_path / "fresh.csv", rows)
    code, out, err = run_main(["score", model, source], capsys)  # predictions on stdout
    assert code == 0
    predicted = [json.loads(line)["predicted"] for line in out.splitlines() if line.strip()]
    right = sum(p == row[-1] for p, row in zip(predicted, rows, strict=True))
    assert err.strip() == (f"sapwood: scored 5,000 records; 5,000 carried a label, "
                           f"accuracy {100 * right / 5_000:.1f}%")


def test_bad_records_are_quarantined_and_unlabelled_ones_predicted(model, fresh, tmp_path,
                                                                   capsys):
    _, rows = fresh
    rows = [list(r) for r in rows[:200]]
    rows[9][AGRAWAL_KEYS.index("salary")] = "abc"    # line 11: not a number
    rows[19] = rows[19][:-2]                          # line 21: two fields short
    rows[29][-1] = ""                                 # line 31: no label, still predicted
    source = write_csv(tmp_path / "dirty.csv", rows)
    code, _, err = run_main(["score", model, source, "--predictions", "p.csv",
                             "--quarantine", "q.jsonl"], capsys)
    assert code == 0, err
    entries = read_jsonl(tmp_path / "q.jsonl")
    assert sorted((e["line"], e["field"], e["reason"]) for e in entries) == [
        (11, "salary", "is not a number"), (21, None, "has 8 fields, expected 10")]
    with open(tmp_path / "p.csv", newline="") as handle:
        written = list(csv.DictReader(handle))
    assert list(written[0]) == ["origin", "line", "predicted", "confidence", "rule"]
    assert [int(w["line"]) for w in written] == [i + 2 for i in range(200) if i not in (9, 19)]
    assert err.strip().startswith("sapwood: scored 198 records; 197 carried a label, ")
    assert err.strip().endswith("; 2 quarantined in q.jsonl")
