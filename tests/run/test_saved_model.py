"""Saved models (stream/saved_model.py): what ``--save`` writes and what comes back.

What is checked, and against what:

* the saved tree equals a :class:`TreeClassifier` the test trains itself on the same
  records, encoded here by hand (numbers as floats, categories and classes coded in
  first-seen order, missing as NaN), rules and predictions alike;
* a model loaded and fed the rest of the stream ends where an uninterrupted learner ends
  (tests/README.md "Contracts": a resumed run equals an uninterrupted one);
* a damaged file (one byte flipped, cut short, empty) is refused with exit code 2 and a
  message naming the file (tests/README.md "Contracts": checksummed state, exit 2 when input cannot be
  read).

Data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993; elevel, car and
zipcode nominal per river's docs, written as text labels), with values blanked out at
random (fixed seed), written to CSV in tmp_path.
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

from connectors.sources import open_sources
from stream.classify.model import TreeClassifier
from stream.classify.settings import TreeSettings
from stream.cli.main import main
from stream.errors import ModelFileError
from stream.rules.classify import extract_rules
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.metrics import ClassificationScore
from stream.run.saved_model import load_model

AGRAWAL_KEYS = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue",
                "hyears", "loan")
NOMINAL_PREFIX = {"elevel": "e", "car": "car", "zipcode": "z"}  # nominal in river's docs
MISSING_TEXT = ("", "NA")


def agrawal_rows(n: int, seed: int, function: int, missing: float) -> list[list[str]]:
    rng = random.Random(seed)
    rows = []
    for x, y in itertools.islice(synth.Agrawal(classification_function=function, seed=seed), n):
        row = []
        for k in AGRAWAL_KEYS:
            if rng.random() < missing:
                row.append(rng.choice(MISSING_TEXT))
            elif k in NOMINAL_PREFIX:
                row.append(f"{NOMINAL_PREFIX[k]}{x[k]}")
            else:
                row.append(repr(float(x[k])))
        rows.append(row + [str(y)])
    return rows


def write_csv(path: Path, rows: list[list[str]]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(list(AGRAWAL_KEYS) + ["group"])
        writer.writerows(rows)
    return path


KINDS = ["category" if k in NOMINAL_PREFIX else "numeric" for k in AGRAWAL_KEYS]


def encode(rows: list[list[str]], books: dict[str, list[str]], classes: list[str]):
    """Rows to (X, y) by hand; ``books`` and ``classes`` grow in first-seen order."""
    X = np.empty((len(rows), len(AGRAWAL_KEYS)))
    y = np.empty(len(rows), np.int32)
    for i, row in enumerate(rows):
        for j, (key, raw) in enumerate(zip(AGRAWAL_KEYS, row[:len(AGRAWAL_KEYS)], strict=True)):
            if raw in MISSING_TEXT:
                X[i, j] = math.nan
            elif key in NOMINAL_PREFIX:
                book = books.setdefault(key, [])
                if raw not in book:
                    book.append(raw)
                X[i, j] = book.index(raw)
            else:
                X[i, j] = float(raw)
        if row[-1] not in classes:
            classes.append(row[-1])
        y[i] = classes.index(row[-1])
    return X, y


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    where = tmp_path_factory.mktemp("saved")
    rows = agrawal_rows(12_000, seed=5, function=4, missing=0.02)
    fresh = agrawal_rows(3_000, seed=6, function=4, missing=0.02)
    return where, rows, fresh


@pytest.fixture(scope="module")
def saved(data):
    where, rows, _ = data
    path = write_csv(where / "all.csv", rows)
    summary = run_learn(LearnJob(sources=[str(path)], target="group",
                                 save_path=str(where / "model.sapwood")))
    return where / "model.sapwood", summary


def test_the_model_file_holds_what_the_run_learned(saved, data):
    path, summary = saved
    _, rows, _ = data
    books, classes = {}, []
    encode(rows, books, classes)
    model = load_model(str(path))
    assert model.schema.to_dict() == summary["schema"]
    assert model.encoder.classes == classes == summary["classes"]
    assert model.encoder.categories == books
    assert model.model.records_learned == summary["learned"] == 12_000
    assert (model.model.n_leaves, model.model.depth) == (summary["leaves"], summary["depth"])
    result = model.score.result(model.encoder.classes)
    assert (result["accuracy"], result["kappa"]) == (summary["accuracy"], summary["kappa"])
    assert model.facts == {"records": 12_000, "quarantined": 0, "target": "group",
                           "concern": None}


def test_the_saved_tree_equals_one_trained_directly(saved, data):
    path, _ = saved
    _, rows, fresh = data
    books, classes = {}, []
    X, y = encode(rows, books, classes)
    direct = TreeClassifier(list(AGRAWAL_KEYS), KINDS, TreeSettings())
    with np.errstate(all="raise"):
        direct.learn(X, y, classes)
    loaded = load_model(str(path)).model
    assert [r.to_dict() for r in extract_rules(loaded, books)] == \
        [r.to_dict() for r in extract_rules(direct, books)]
    X_new, _ = encode(fresh, books, list(classes))
    a, b = loaded.predict(X_new), direct.predict(X_new)
    assert np.array_equal(a.pred, b.pred)
    assert np.array_equal(a.confidence, b.confidence)
    assert np.array_equal(a.leaf, b.leaf)


def test_a_loaded_model_learns_on_like_an_uninterrupted_one(data, tmp_path):
    where, rows, fresh = data
    first = write_csv(tmp_path / "first.csv", rows[:5_000])
    second = write_csv(tmp_path / "second.csv", rows[5_000:])
    run_learn(LearnJob(sources=[str(first)], target="group",
                       save_path=str(tmp_path / "half.sapwood")))
    resumed = load_model(str(tmp_path / "half.sapwood"))
    source = open_sources([str(second)])
    try:
        for batch in source.batches():
            encoded = resumed.encoder.encode(batch)
            scored = resumed.model.learn(encoded.X, encoded.y, resumed.encoder.classes)
            resumed.score.update(encoded.y, scored.pred, len(resumed.encoder.classes))
    finally:
        source.close()

    books, classes = {}, []
    X, y = encode(rows, books, classes)
    uninterrupted = TreeClassifier(list(AGRAWAL_KEYS), KINDS, TreeSettings())
    scored = uninterrupted.learn(X, y, classes)
    score = ClassificationScore(1000, 0.999)
    score.update(y, scored.pred, len(classes))

    assert resumed.model.records_learned == 12_000
    assert [r.to_dict() for r in extract_rules(resumed.model, books)] == \
        [r.to_dict() for r in extract_rules(uninterrupted, books)]
    X_new, _ = encode(fresh, books, list(classes))
    assert np.array_equal(resumed.model.predict(X_new).pred, uninterrupted.predict(X_new).pred)
    assert resumed.score.result(classes) == score.result(classes)


# ---------------------------------------------------------------- damaged files

def _run(args, capsys) -> tuple[int, str]:
    """Run ``sapwood ARGS`` in-process; returns (exit code, stderr)."""
    code, _, err = _run_out(args, capsys)
    return code, err


def _run_out(args, capsys) -> tuple[int, str, str]:
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in args])
    out, err = capsys.readouterr()
    return stop.value.code, out, err


def _damaged(original: Path, where: Path, how: str) -> Path:
    data = bytearray(original.read_bytes())
    if how == "empty":
        data = bytearray()
    elif how == "cut short":
        data = data[:len(data) // 3]
    else:
        position = {"first byte": 0, "header": 20, "middle": len(data) // 2,
                    "last byte": len(data) - 1}[how]
        data[position] ^= 0x5A
    path = where / f"damaged-{how.replace(' ', '-')}.sapwood"
    path.write_bytes(bytes(data))
    return path


DAMAGE = ["first byte", "header", "middle", "last byte", "cut short", "empty"]


@pytest.mark.parametrize("how", DAMAGE)
def test_a_damaged_model_is_refused_naming_the_file(how, saved, data, tmp_path, capsys):
    path, _ = saved
    damaged = _damaged(path, tmp_path, how)
    with pytest.raises(ModelFileError) as error:
        load_model(str(damaged))
    assert repr(str(damaged)) in str(error.value)
    sample = write_csv(tmp_path / "sample.csv", data[2][:10])
    for command in (["score", damaged, sample, "--predictions", tmp_path / "p.jsonl"],
                    ["rules", damaged]):
        code, err = _run(command, capsys)
        assert code == 2, (command[0], err)
        line = [x for x in err.splitlines() if x.strip()][-1]
        assert line.startswith(f"sapwood: {str(damaged)!r} "), (command[0], line)
    assert not (tmp_path / "p.jsonl").exists()


def test_a_flipped_array_byte_is_caught_by_its_checksum(saved, tmp_path, capsys):
    damaged = _damaged(saved[0], tmp_path, "last byte")
    code, err = _run(["rules", damaged], capsys)
    assert code == 2
    assert f"sapwood: {str(damaged)!r} is corrupt: checksum of array " in err


def test_a_missing_model_exits_2(tmp_path, capsys):
    sample = tmp_path / "s.csv"
    sample.write_text("a,group\n1,x\n")
    code, err = _run(["score", tmp_path / "absent.sapwood", sample], capsys)
    assert code == 2
    assert repr(str(tmp_path / "absent.sapwood")) in err


def test_a_snapshot_is_not_a_model_for_scoring(saved, data, tmp_path, capsys):
    snapshot = tmp_path / "rules.json"
    code, out, _ = _run_out(["rules", saved[0], "--form", "json"], capsys)
    assert code == 0 and json.loads(out)["rules"]
    snapshot.write_text(out)
    sample = write_csv(tmp_path / "sample.csv", data[2][:10])
    code, err = _run(["score", snapshot, sample], capsys)
    assert code == 2
    assert f"sapwood: {str(snapshot)!r} is not a sapwood state file" in err
