"""Keyed runs (``sapwood learn --by FIELD``): one tree per key, each the tree its records
alone would grow.

Sources named beside each check:

* river 0.26.1 ``tree.HoeffdingTreeClassifier(leaf_prediction="mc")`` (the reference
  learner; sapwood's plain tree equals it record for record, tests/classify/test_model.py),
  one per key, fed only that key's records: every key's predictions must equal it;
* a single-tree ``sapwood learn`` of each key's records alone (a file of those records,
  the keyed run's schema): predictions, metrics log, final rules and summary figures
  equal, so the keying adds nothing and loses nothing;
* data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993; river 0.26.1
  ``synth.Agrawal``), keyed by its education level ``elevel`` (5 values) or its car make
  ``car`` (20 values), which the generator's documentation lists as nominal.
"""

from __future__ import annotations

import csv
import itertools
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from river import tree as river_tree
from river.datasets import synth

from connectors.local_brokers import REDIS_SERVER, LocalRedis
from stream.child_env import same_code_env
from stream.errors import ConfigError
from stream.run.engine import LearnRun
from stream.run.job import LearnJob
from stream.run import keyed
from stream.run.keyed import KeyedRun, key_folder
from stream.views.keys import path_for_key

NOMINAL = ("car", "zipcode")   # with elevel as the key, the other nominal fields
FIGURES = ("records", "learned", "quarantined", "accuracy", "kappa", "leaves", "depth",
           "concern", "concern_precision", "concern_recall", "window_accuracy",
           "drift_alarms", "swaps")


def write_agrawal(path: Path, n: int, function: int = 1, seed: int = 11,
                  edit=None) -> pd.DataFrame:
    """``n`` Agrawal records as CSV (floats in ``repr``, exact through the file)."""
    rows = []
    for i, (x, y) in enumerate(itertools.islice(
            synth.Agrawal(classification_function=function, seed=seed), n)):
        row = {k: repr(float(v)) if isinstance(v, float) else str(v) for k, v in x.items()}
        row["class"] = str(y)
        if edit is not None:
            edit(i, row)
        rows.append(row)
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.DictWriter(out, list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return pd.read_csv(path, dtype=str, keep_default_na=False)


def keyed_job(data: Path, out: Path, by: str, **extra) -> LearnJob:
    extra.setdefault("batch_rows", 1000)
    (out / "logs").mkdir(parents=True, exist_ok=True)   # as for a single run's files
    return LearnJob(sources=[str(data)], target="class", by=by,
                    declared={n: "category" for n in NOMINAL if n != by},
                    snapshot_dir=str(out / "rules"), snapshot_every=4000,
                    metrics_path=str(out / "logs" / "metrics.jsonl"), metrics_every=500,
                    predictions_path=str(out / "logs" / "predictions.csv"),
                    events_path=str(out / "logs" / "events.jsonl"),
                    summary_path=str(out / "logs" / "run.json"),
                    quarantine_path=str(out / "logs" / "quarantine.jsonl"), **extra)


def final_rules(snapshots: Path) -> list:
    index = json.loads((snapshots / "index.json").read_text())
    newest = max(index["snapshots"], key=lambda e: e["sequence"])
    return json.loads((snapshots / newest["json"]).read_text())["rules"]


def predictions(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def agrawal(tmp_path_factory):
    folder = tmp_path_factory.mktemp("keyed")
    data = folder / "agrawal.csv"
    return data, write_agrawal(data, 30_000)


def test_key_folders_are_plain_names_or_distinct_hashed_ones():
    assert key_folder("line-7") == "line-7"
    assert key_folder("Line_7.b") == "Line_7.b"
    odd = [key_folder(k) for k in ("a/b", "a b", "a_b", "..", "", "keys.json", "ü")]
    assert len(set(odd)) == len(odd)
    assert all("/" not in f and f not in ("", ".", "..", "keys.json") for f in odd)
    assert key_folder("a/b").startswith("a_b-")


def test_each_key_is_the_run_of_its_own_records(agrawal, tmp_path):
    # source: a single-tree run of each key's records alone with the keyed run's schema
    data, frame = agrawal
    summary = KeyedRun(keyed_job(data, tmp_path / "k", "elevel")).run()
    keys = sorted(frame["elevel"].unique())
    assert summary["keys"] == len(keys) == 5
    index = {e["key"]: e for e in json.loads(
        (tmp_path / "k" / "logs" / "keys.json").read_text())["keys"]}
    assert summary["records"] == summary["learned"] == len(frame)
    schema = tmp_path / "k" / "logs" / "schema.json"
    assert json.loads(schema.read_text())["fields"][3] == {"name": "elevel",
                                                           "kind": "ignore"}
    for key in keys:
        own = tmp_path / f"own-{key}"
        own.mkdir()
        mine = frame[frame["elevel"] == key]
        mine.to_csv(own / "data.csv", index=False)
        single = LearnRun(LearnJob(
            sources=[str(own / "data.csv")], target="class", schema_path=str(schema),
            snapshot_dir=str(own / "rules"), snapshot_every=4000,
            metrics_path=str(own / "metrics.jsonl"), metrics_every=500,
            predictions_path=str(own / "predictions.csv"),
            events_path=str(own / "events.jsonl"))).run()
        folder = tmp_path / "k" / "logs" / key_folder(key)
        keyed = index[key]
        assert {f: keyed.get(f) for f in FIGURES} == {f: single.get(f) for f in FIGURES}
        assert (folder / "metrics.jsonl").read_bytes() == (own / "metrics.jsonl").read_bytes()
        ours, theirs = predictions(folder / "predictions.csv"), predictions(
            own / "predictions.csv")
        # the keyed run names each record's line in the shared file; the single run, in
        # the key's own file: line i+2 of that file is the i-th record of the key
        assert ours["line"].astype(int).tolist() == (mine.index + 2).tolist()
        assert ours.drop(columns=["origin", "line"]).equals(
            theirs.drop(columns=["origin", "line"]))
        assert final_rules(tmp_path / "k" / "rules" / key_folder(key)) == \
            final_rules(own / "rules")
        assert single["leaves"] > 1, "each key must grow a real tree for this to mean much"
    index = json.loads((tmp_path / "k" / "rules" / "keys.json").read_text())
    assert [e["key"] for e in index["keys"]] == list(frame["elevel"].unique())


def test_each_key_predicts_as_river_does_on_that_keys_records(agrawal, tmp_path):
    # source: river 0.26.1 HoeffdingTreeClassifier(leaf_prediction="mc") per key, fed
    # only that key's records, features as in the file less the key
    data, frame = agrawal
    KeyedRun(keyed_job(data, tmp_path, "elevel",
                       options={"leaf_model": "majority", "detector": "off"})).run()
    features = [c for c in frame.columns if c not in ("class", "elevel")]
    grown = 0
    for key in frame["elevel"].unique():
        reference = river_tree.HoeffdingTreeClassifier(leaf_prediction="mc",
                                                       nominal_attributes=list(NOMINAL))
        theirs = []
        for _, row in frame[frame["elevel"] == key].iterrows():
            x = {f: (row[f] if f in NOMINAL else float(row[f])) for f in features}
            theirs.append(reference.predict_one(x))
            reference.learn_one(x, row["class"])
        ours = predictions(tmp_path / "logs" / key_folder(key) / "predictions.csv")
        expected = ["" if p is None else str(p) for p in theirs]
        differing = np.flatnonzero(np.array(ours["predicted"].tolist()) != np.array(expected))
        assert differing.size == 0, f"key {key}: {differing.size} predictions differ"
        grown += reference.n_nodes > 1
    assert grown == 5


def test_few_keys_in_memory_change_nothing(agrawal, tmp_path, monkeypatch):
    # 20 keys (car makes), 3 trees in memory and small buffers: the others are saved and
    # reloaded many times; every output equals the run that holds all keys
    data, frame = agrawal
    whole = KeyedRun(keyed_job(data, tmp_path / "all", "car")).run()
    monkeypatch.setattr(keyed, "WINDOW_RECORDS", 700)
    tight = KeyedRun(keyed_job(data, tmp_path / "few", "car", keys_in_memory=3)).run()
    assert whole["evictions"] == 0 and tight["evictions"] > 20 and tight["reloads"] > 0
    assert tight["keys"] == whole["keys"] == 20
    for key in frame["car"].unique():
        a = tmp_path / "all" / "logs" / key_folder(key)
        b = tmp_path / "few" / "logs" / key_folder(key)
        for name in ("metrics.jsonl", "predictions.csv"):
            assert (a / name).read_bytes() == (b / name).read_bytes(), (key, name)
        assert final_rules(tmp_path / "all" / "rules" / key) == \
            final_rules(tmp_path / "few" / "rules" / key)
    assert whole["accuracy"] == pytest.approx(tight["accuracy"], abs=0)


def test_records_without_a_key_are_quarantined_and_late_keys_get_a_tree(tmp_path):
    def edit(i, row):
        if i % 1000 == 7:
            row["elevel"] = ""
        if i >= 9_800:
            row["elevel"] = "late"      # a key first seen at the end of the stream
    data = tmp_path / "data.csv"
    frame = write_agrawal(data, 10_000, edit=edit)
    summary = KeyedRun(keyed_job(data, tmp_path, "elevel")).run()
    blank = frame.index[frame["elevel"] == ""]
    assert summary["quarantined"] == len(blank) == 10
    lines = [json.loads(x) for x in (tmp_path / "logs" / "quarantine.jsonl").open()]
    assert [q["line"] for q in lines] == (blank + 2).tolist()
    assert lines[0]["field"] == "elevel" and "no value for the key field" in lines[0]["reason"]
    index = json.loads((tmp_path / "logs" / "keys.json").read_text())["keys"]
    late = [e for e in index if e["key"] == "late"]
    assert late[0]["learned"] == 200 and index[-1] is late[0]
    assert summary["records"] == 10_000 and summary["learned"] == 10_000 - 10


def test_views_take_a_key_and_refuse_a_keyed_folder_without_one(agrawal, tmp_path):
    data, _ = agrawal
    KeyedRun(keyed_job(data, tmp_path, "elevel", save_path=str(tmp_path / "m" / "model.sw"))).run()
    rules = str(tmp_path / "rules")
    assert path_for_key(rules, "3") == os.path.join(rules, "3")
    assert path_for_key(str(tmp_path / "m" / "model.sw"), "2") == \
        str(tmp_path / "m" / "2" / "model.sw")
    with pytest.raises(ConfigError, match="one tree per key.*5 values of 'elevel'"):
        path_for_key(rules, None)
    with pytest.raises(ConfigError, match="no such key"):
        path_for_key(rules, "9")
    run = subprocess.run([sys.executable, "-m", "stream.cli", "rules", rules, "--key", "3"],
                         capture_output=True, text=True, env=same_code_env())
    assert run.returncode == 0 and "sapwood rules for class" in run.stdout
    listing = subprocess.run([sys.executable, "-m", "stream.cli", "keys", rules],
                             capture_output=True, text=True, env=same_code_env())
    assert listing.returncode == 0 and "5 keys" in listing.stdout


def test_a_keyed_run_refuses_what_it_cannot_do(agrawal, tmp_path):
    data, _ = agrawal
    for extra, message in (({"by": "class"}, "other than the target"),
                           ({"alerts_path": str(tmp_path / "a.jsonl")}, "--alerts"),
                           ({"predictions_path": "-"}, "must be a file"),
                           ({"declared": {"elevel": "numeric"}}, "not a feature")):
        job = LearnJob(sources=[str(data)], target="class", **{"by": "elevel", **extra})
        with pytest.raises(ConfigError, match=message):
            KeyedRun(job)


@pytest.mark.slow
def test_a_killed_keyed_run_ends_as_an_uninterrupted_one(tmp_path):
    # SIGKILL at 4 points (after the 1st, 3rd, 5th and 8th keyed checkpoint), each time
    # the same command again; 20 keys and 6 in memory, so state files of saved keys and
    # of the checkpoint are both in play. Every key's outputs equal the uninterrupted
    # run's (metrics, predictions: each record once; final rules).
    data = tmp_path / "data.csv"
    frame = write_agrawal(data, 60_000, function=2, seed=7)

    def command(out: Path) -> list[str]:
        return [sys.executable, "-m", "stream.cli", "learn", str(data), "--target", "class",
                "--by", "car", "--kind", "zipcode=category", "--keys-in-memory", "6",
                "--snapshots", str(out / "rules"), "--snapshot-every", "2000",
                "--metrics", str(out / "logs" / "metrics.jsonl"), "--metrics-every", "500",
                "--predictions", str(out / "logs" / "predictions.csv"),
                "--summary", str(out / "logs" / "run.json"), "--batch-rows", "1000",
                "--checkpoint", str(out / "state"), "--checkpoint-every", "3000", "-q"]

    env = same_code_env()
    reference = tmp_path / "ref"
    subprocess.run(command(reference), check=True, env=env)
    killed = tmp_path / "killed"
    manifest = killed / "state" / "keyed-checkpoint.json"
    for wanted in (1, 3, 5, 8):
        child = subprocess.Popen(command(killed), env=env)
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and child.poll() is None:
            if manifest.exists():
                try:
                    written = json.loads(manifest.read_text())["records"]
                except ValueError:
                    written = 0
                if written >= wanted * 3000:
                    break
            time.sleep(0.01)
        child.send_signal(signal.SIGKILL)
        child.wait()
    subprocess.run(command(killed), check=True, env=env)
    summary = json.loads((killed / "logs" / "run.json").read_text())
    assert summary["resumes"] >= 1
    for key in frame["car"].unique():
        a, b = reference / "logs" / key, killed / "logs" / key
        for name in ("metrics.jsonl", "predictions.csv"):
            assert (a / name).read_bytes() == (b / name).read_bytes(), (key, name)
        lines = predictions(b / "predictions.csv")["line"].astype(int)
        assert lines.is_unique and len(lines) == (frame["car"] == key).sum()
        assert final_rules(reference / "rules" / key) == final_rules(killed / "rules" / key)


@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                                                 "(bash .ci/brokers.sh install adds it)")
def test_a_keyed_run_from_a_redis_stream_acknowledges_what_it_learned(agrawal, tmp_path):
    # redis-server (Debian's package) on a loopback port; the records of the file as
    # stream entries. Every key's predictions equal those of the keyed run over the file,
    # and the group holds no entry pending at the end.
    data, frame = agrawal
    part = frame.iloc[:6000]
    (tmp_path / "redis").mkdir()
    server = LocalRedis(tmp_path / "redis", durable=False).start()
    try:
        client = server.client()
        pipe = client.pipeline(transaction=False)
        for row in part.to_dict("records"):
            pipe.xadd("fleet", row)
        pipe.execute()
        job = keyed_job(server.url(stream="fleet", group="g", idle_exit=1),
                        tmp_path / "broker", "elevel")
        summary = KeyedRun(job).run()
        pending = client.xpending("fleet", "g")["pending"]
    finally:
        server.stop()
    assert summary["learned"] == 6000 and pending == 0
    small = tmp_path / "file.csv"
    part.to_csv(small, index=False)
    KeyedRun(keyed_job(small, tmp_path / "file", "elevel")).run()
    for key in part["elevel"].unique():
        ours = predictions(tmp_path / "broker" / "logs" / key / "predictions.csv")
        theirs = predictions(tmp_path / "file" / "logs" / key / "predictions.csv")
        assert ours["predicted"].tolist() == theirs["predicted"].tolist()


def test_a_followed_keyed_run_stops_on_sigterm_and_goes_on(tmp_path):
    # SIGTERM while following a file: exit 0 after a keyed checkpoint; records appended
    # meanwhile are learned by the same command run again, each once, and every key's
    # predictions equal a run over the whole file at once
    data = tmp_path / "data.csv"
    frame = write_agrawal(data, 8000, function=2, seed=7)
    text = data.read_text().splitlines(keepends=True)
    data.write_text("".join(text[:4001]))          # the header and 4,000 records
    (tmp_path / "out" / "logs").mkdir(parents=True)

    def command(*extra: str) -> list[str]:
        return [sys.executable, "-m", "stream.cli", "learn", str(data), "--target", "class",
                "--by", "elevel", "--follow", "--poll-seconds", "0.05",
                "--kind", "car=category", "--kind", "zipcode=category",  # as keyed_job
                "--predictions", str(tmp_path / "out" / "logs" / "predictions.csv"),
                "--summary", str(tmp_path / "out" / "logs" / "run.json"),
                "--checkpoint", str(tmp_path / "out" / "state"), "-q", *extra]

    env = same_code_env()
    child = subprocess.Popen(command(), env=env)
    manifest = tmp_path / "out" / "state" / "keyed-checkpoint.json"
    deadline = time.monotonic() + 120
    summary_path = tmp_path / "out" / "logs" / "run.json"
    while time.monotonic() < deadline and child.poll() is None:
        indexes = list((tmp_path / "out" / "logs").glob("*/predictions.csv"))
        if indexes and sum(len(p.read_text().splitlines()) - 1 for p in indexes) >= 4000:
            break
        time.sleep(0.05)
    child.send_signal(signal.SIGTERM)
    assert child.wait(60) == 0
    stopped = json.loads(summary_path.read_text())
    assert stopped["stopped"] == "SIGTERM" and manifest.exists()
    with open(data, "a") as out:
        out.write("".join(text[4001:]))
    subprocess.run(command("--idle-exit", "1"), check=True, env=env)
    summary = json.loads(summary_path.read_text())
    assert summary["learned"] == 8000 and summary["resumes"] == 1
    whole = tmp_path / "whole"
    KeyedRun(keyed_job(data, whole, "elevel")).run()
    assert (whole / "logs" / "schema.json").read_text() == \
        (tmp_path / "out" / "logs" / "schema.json").read_text()
    for key in frame["elevel"].unique():
        ours = predictions(tmp_path / "out" / "logs" / key / "predictions.csv")
        theirs = predictions(whole / "logs" / key / "predictions.csv")
        for column in ours.columns:
            assert ours[column].tolist() == theirs[column].tolist(), (key, column)
