"""Delayed labels (stream/delayed_labels.py; sapwood learn --labels).

What is checked, and against what:

* Labels that come right after their record (on their own source) give the same
  predictions, metrics log and summary as the same records with the labels inline.
* Labels k records late: every prediction equals a reference loop written here with
  sapwood's TreeClassifier alone (predict each record on arrival, learn it k records
  later); accuracy and kappa equal river 0.26.1's ``metrics.Accuracy`` and
  ``metrics.CohenKappa`` fed the arrival predictions; the final tree equals the inline
  run's (the records are learned in the same order); results do not depend on batch size.
* Labels that never come, or come after the window (records or data seconds), are
  counted and their records dropped; labels that come before their record are used when
  it arrives; memory stays within the window.
* A run resumed from any of its checkpoints ends as the uninterrupted run.

Data: river's SEA generator (Street & Kim, 2001; ``synth.SEA(variant=1, seed=3)``),
written to CSV with an id, a time (one record per second) and ``repr`` floats.
"""

from __future__ import annotations

import csv
import itertools
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from river import metrics as river_metrics
from river.datasets import synth
from tests.run.checkpoint_copies import keep_every_checkpoint

from connectors.local_brokers import MOSQUITTO, REDIS_SERVER, LocalMosquitto, LocalRedis
from stream.classify.model import TreeClassifier
from stream.classify.settings import TreeSettings
from stream.errors import ConfigError
from stream.run import checkpoint as ck
from stream.run.delayed_labels import EarlyLabels, PendingRecords, watermarks
from stream.run.engine import LearnRun, run_learn
from stream.run.job import LearnJob
import stream.run.resume as resume
from stream.views.rule_sources import load_rules

N = 4000
T0 = 1_700_000_000
TIMING = {"seconds", "records_per_second", "startup_seconds", "checkpoint", "outputs",
          "stopped", "sources", "labels"}


@pytest.fixture(scope="module")
def sea():
    return [(f"r{i}", T0 + i, x[0], x[1], x[2], str(y)) for i, (x, y) in
            enumerate(itertools.islice(synth.SEA(variant=1, seed=3), N))]


def write(path: Path, header, rows) -> str:
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    return str(path)


@pytest.fixture(scope="module")
def files(sea, tmp_path_factory):
    d = tmp_path_factory.mktemp("delayed")
    inline = write(d / "inline.csv", ["id", "time", "a", "b", "c", "label"],
                   [(i, t, repr(a), repr(b), repr(c), y) for i, t, a, b, c, y in sea])
    records = write(d / "records.csv", ["id", "time", "a", "b", "c"],
                    [(i, t, repr(a), repr(b), repr(c)) for i, t, a, b, c, y in sea])
    return {"dir": d, "inline": inline, "records": records}


def labels_file(files, sea, name: str, delay_of) -> str:
    """Labels stamped ``delay_of(i)`` seconds (= records) after record i; None: none."""
    rows = [(i, y, t + delay_of(n)) for n, (i, t, a, b, c, y) in enumerate(sea)
            if delay_of(n) is not None]
    rows.sort(key=lambda r: r[2])  # labels arrive in time order on their source
    return write(files["dir"] / name, ["id", "label", "time"], rows)


def learn(files, out: str, sources, **extra) -> dict:
    d = files["dir"]
    job = LearnJob(sources=sources, target="label", task="classification",
                   predictions_path=str(d / f"{out}.jsonl"),
                   metrics_path=str(d / f"{out}.metrics"), metrics_every=250,
                   save_path=str(d / f"{out}.sap"), **extra)
    return run_learn(job)


def read_jsonl(path) -> list[dict]:
    return [json.loads(line) for line in Path(path).read_text().splitlines()]


def predictions(path) -> list[tuple]:
    """(line, id, predicted, confidence, rule) of each prediction (origins differ)."""
    return [(p["line"], p["id"], p["predicted"], p["confidence"], p["rule"])
            for p in read_jsonl(path)]


# ------------------------------------------------------------------------ equivalences

def test_labels_right_after_their_records_equal_inline_labels(files, sea):
    inline = learn(files, "inline", [files["inline"]])
    late = labels_file(files, sea, "labels0.csv", lambda n: 0)
    joined = learn(files, "k0", [files["records"]], labels=[late])
    d = files["dir"]
    assert predictions(d / "k0.jsonl") == predictions(d / "inline.jsonl")
    assert (d / "k0.metrics").read_text() == (d / "inline.metrics").read_text()
    assert {k: v for k, v in joined.items() if k not in TIMING} == \
        {k: v for k, v in inline.items() if k not in TIMING}
    assert joined["labels"]["joined"] == N and joined["labels"]["waiting"] == 0


def reference_predictions(sea, k: int) -> list[str]:
    """Predict each record on arrival, learn it when its label comes k records later."""
    X = np.array([[a, b, c] for _, _, a, b, c, _ in sea])
    y = [label for *_, label in sea]
    model = TreeClassifier(["a", "b", "c"], ["numeric"] * 3, TreeSettings())
    classes: list[str] = []
    out = []

    def learn_one(j):
        if y[j] not in classes:
            classes.append(y[j])
        model.learn(X[j:j + 1], np.array([classes.index(y[j])], np.int32), classes)

    for i in range(len(sea)):
        pred = int(model.predict(X[i:i + 1]).pred[0])
        out.append(classes[pred] if pred >= 0 else "")
        if i - k >= 0:
            learn_one(i - k)   # its label is stamped with record i's time: after it
    return out


@pytest.mark.parametrize("rows", [7, 65536])
def test_labels_k_records_late_match_a_plain_reference_loop(files, sea, rows):
    k = 25
    late = labels_file(files, sea, "labels25.csv", lambda n: k)
    summary = learn(files, f"k25-{rows}", [files["records"]], labels=[late],
                    batch_rows=rows)
    got = read_jsonl(files["dir"] / f"k25-{rows}.jsonl")
    assert [p["line"] for p in got] == list(range(2, N + 2))   # emitted on arrival
    assert [p["predicted"] for p in got] == reference_predictions(sea, k)
    # river's metrics, fed the predictions made on arrival (None: no prediction yet)
    accuracy, kappa = river_metrics.Accuracy(), river_metrics.CohenKappa()
    for p, (*_, label) in zip(got, sea):
        accuracy.update(label, p["predicted"] or None)
        kappa.update(label, p["predicted"] or None)
    assert summary["accuracy"] == pytest.approx(accuracy.get(), abs=1e-12)
    assert summary["kappa"] == pytest.approx(kappa.get(), abs=1e-12)
    # learned in the same order as with inline labels: the same final tree
    learn(files, "inline-rules", [files["inline"]])
    assert load_rules(str(files["dir"] / f"k25-{rows}.sap"))[1] == \
        load_rules(str(files["dir"] / "inline-rules.sap"))[1]


# ------------------------------------------------------------------------ live labels

@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                    "(bash .ci/brokers.sh install adds it)")
@pytest.mark.parametrize("rows", [7, 65536])
def test_labels_from_a_redis_stream_join_like_labels_from_a_file(files, sea, tmp_path, rows):
    """Labels 25 records late, all on a Redis stream before the run: polled once per batch
    of records, they join exactly as the same labels from a file (same predictions,
    metrics and tree), and every label entry is acknowledged (XPENDING, as documented by
    Redis, reports none left)."""
    k = 25
    late = labels_file(files, sea, "labels25-live.csv", lambda n: k)
    server = LocalRedis(tmp_path, durable=False).start()
    try:
        client = server.client()
        pipe = client.pipeline(transaction=False)
        with open(late, newline="", encoding="utf-8") as rows_in:
            for row in csv.DictReader(rows_in):
                pipe.xadd("labels", row)
        pipe.execute()
        from_file = learn(files, f"k25-file-{rows}", [files["records"]], labels=[late],
                          batch_rows=rows)
        live = learn(files, f"k25-live-{rows}", [files["records"]],
                     labels=[server.url(stream="labels")], batch_rows=rows)
        d = files["dir"]
        assert predictions(d / f"k25-live-{rows}.jsonl") == \
            predictions(d / f"k25-file-{rows}.jsonl")
        assert (d / f"k25-live-{rows}.metrics").read_text() == \
            (d / f"k25-file-{rows}.metrics").read_text()
        assert {k: v for k, v in live.items() if k not in TIMING} == \
            {k: v for k, v in from_file.items() if k not in TIMING}
        assert live["labels"]["joined"] == from_file["labels"]["joined"] > N - 2 * k
        assert client.xpending("labels", "sapwood")["pending"] == 0
    finally:
        server.stop()


@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                    "(bash .ci/brokers.sh install adds it)")
def test_an_empty_label_stream_does_not_hold_the_records_up(files, tmp_path):
    """Nothing has arrived on the label stream: the records are predicted and wait, the
    run ends, and the waiting ones are counted, none learned."""
    server = LocalRedis(tmp_path, durable=False).start()
    try:
        server.client().xadd("labels", {"id": "nobody", "label": "1", "time": str(T0)})
        summary = learn(files, "empty-live", [files["records"]],
                        labels=[server.url(stream="labels")], label_window=100)
    finally:
        server.stop()
    assert summary["records"] == N and summary["learned"] == 0
    assert summary["labels"]["joined"] == 0


@pytest.mark.skipif(MOSQUITTO is None, reason="mosquitto is not installed "
                    "(bash .ci/brokers.sh install adds it)")
def test_labels_from_an_mqtt_topic_are_joined(files, sea, tmp_path):
    """Labels published (QoS 1) to a topic while sapwood's persistent session was away
    (MQTT 3.1.1/5.0: the broker keeps them for the session) reach the run and are joined.
    When they arrive depends on the broker, so the check is that labels were joined and
    that each joined record was learned with its own label, not the exact counts."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    from connectors.mqtt import MqttSource

    late = labels_file(files, sea, "labels-mqtt.csv", lambda n: 25)
    broker = LocalMosquitto(tmp_path).start()
    try:
        url = broker.url("site/labels", client_id="sapwood-labels")
        session = MqttSource(url, idle_exit=0)       # subscribe once: the session exists
        for _ in session.batches():
            pass
        session.close()
        client = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
        client.connect("127.0.0.1", broker.port)
        client.loop_start()
        with open(late, newline="", encoding="utf-8") as rows_in:
            infos = [client.publish("site/labels", json.dumps(row), qos=1)
                     for row in csv.DictReader(rows_in)]
        for info in infos:
            info.wait_for_publish(10)
        client.disconnect()
        client.loop_stop()
        summary = learn(files, "mqtt-live", [files["records"]], labels=[url], batch_rows=7)
    finally:
        broker.stop()
    assert summary["records"] == N
    assert summary["labels"]["joined"] > 0
    assert summary["learned"] == summary["labels"]["joined"]
    # every record learned was scored against its own label: accuracy is that of a tree
    # learning SEA, far above the 50 % a mismatched join would give
    assert summary["accuracy"] > 0.75


# ------------------------------------------------------------------------ windows

def test_labels_that_never_come_or_come_too_late_are_counted(files, sea):
    window = 50

    def delay(n):
        if n % 10 == 0:
            return None            # never labelled
        if n % 13 == 0:
            return 80              # later than the window
        return 3

    late = labels_file(files, sea, "labels-mixed.csv", delay)
    summary = learn(files, "mixed", [files["records"]], labels=[late],
                    label_window=window)
    never = sum(1 for n in range(N) if n % 10 == 0)
    # a record waits while fewer than `window` records have come after it: near the end
    # of the stream its late label still finds it
    too_late = sum(1 for n in range(N) if n % 10 and n % 13 == 0 and n + window < N)
    labels = summary["labels"]
    assert summary["learned"] == labels["joined"] == N - never - too_late
    assert labels["expired"] + labels["waiting"] == never + too_late
    assert labels["waiting"] <= window
    assert labels["unmatched"] + labels["early_waiting"] == too_late
    assert len(read_jsonl(files["dir"] / "mixed.jsonl")) == N   # all predicted on arrival


def test_a_window_in_data_seconds(files, sea):
    late = labels_file(files, sea, "labels-seconds.csv",
                       lambda n: 30 if n % 4 == 0 else 5)
    summary = learn(files, "seconds", [files["records"]], labels=[late],
                    label_seconds=10.0)
    quarter = sum(1 for n in range(N) if n % 4 == 0)
    assert summary["labels"]["joined"] == N - quarter
    assert summary["labels"]["expired"] + summary["labels"]["waiting"] == quarter


def test_labels_before_their_records_are_used_when_the_record_arrives(files, sea):
    early = labels_file(files, sea, "labels-early.csv", lambda n: -3)
    summary = learn(files, "early", [files["records"]], labels=[early])
    assert summary["labels"]["inline"] == N and summary["learned"] == N
    assert summary["labels"]["unmatched"] == 0


def test_pending_records_stay_within_the_window():
    pending = PendingRecords(n_features=2, window=100)
    for start in range(0, 5000, 37):
        n = 37
        ids = np.array([f"x{i}" for i in range(start, start + n)], dtype=object)
        pending.add(ids, np.zeros((n, 2)), np.zeros(n), np.zeros(n), np.zeros(n),
                    np.zeros(n, np.int64))
        assert len(pending) <= 100 and pending.X.shape == (100, 2)
    assert pending.expired == pending.arrivals - 100
    assert len(pending.take(["x4999", "x10", "nope"])) == 3 and len(pending) == 99


def test_early_labels_stay_within_the_window():
    early = EarlyLabels(window=100)
    for start in range(0, 5000, 50):
        early.add([f"x{i}" for i in range(start, start + 50)], np.ones(50), start,
                  np.zeros(50))
        assert len(early) <= 100
    assert early.unmatched == 4900


def test_watermarks_carry_over_missing_times():
    marks = watermarks(np.array([5.0, np.nan, 3.0, 7.0]), 4.0)
    assert marks.tolist() == [5.0, 5.0, 5.0, 7.0]


# ------------------------------------------------------------------------ errors

def test_delayed_labels_need_a_time_and_an_id(files, sea, tmp_path):
    no_time = write(tmp_path / "r.csv", ["id", "a", "label"], [("r1", 1.0, "")])
    labels = write(tmp_path / "l.csv", ["id", "label"], [("r1", "x")])
    with pytest.raises(ConfigError, match="the schema needs a time field"):
        run_learn(LearnJob(sources=[no_time], target="label", labels=[labels],
                           task="classification", quarantine_path=str(tmp_path / "q")))
    with pytest.raises(ConfigError, match=r"name it with --id-field"):
        run_learn(LearnJob(sources=[files["records"]], target="label", labels=[labels],
                           task="classification", declared={"id": "ignore"},
                           quarantine_path=str(tmp_path / "q")))
    with pytest.raises(ConfigError, match=r"the records carry no 'label' \(their labels "
                                          r"come from --labels\): give --task or --schema"):
        run_learn(LearnJob(sources=[files["records"]], target="label", labels=[labels],
                           quarantine_path=str(tmp_path / "q")))


# ------------------------------------------------------------------------ resume

def test_resuming_from_every_checkpoint_equals_the_uninterrupted_run(files, sea, tmp_path,
                                                                      monkeypatch):
    late = labels_file(files, sea, "labels-resume.csv",
                       lambda n: None if n % 17 == 0 else 40 if n % 5 == 0 else 2)
    out = tmp_path / "run"
    out.mkdir()

    def job():
        return LearnJob(sources=[files["records"]], target="label", task="classification",
                        labels=[late], label_window=30, checkpoint_path=str(out / "c.ckpt"),
                        checkpoint_every=600, checkpoint_seconds=0, batch_rows=250,
                        predictions_path=str(out / "p.jsonl"),
                        metrics_path=str(out / "m.jsonl"), metrics_every=100)

    copies = keep_every_checkpoint(monkeypatch, tmp_path)
    reference = LearnRun(job()).run()
    monkeypatch.setattr(resume, "write_checkpoint", ck.write_checkpoint)
    full = tmp_path / "full"
    shutil.copytree(out, full)
    assert len(copies) >= 5 and reference["labels"]["expired"] > 0
    for copy in copies[:-1]:
        shutil.rmtree(out)
        shutil.copytree(full, out)
        os.remove(out / "c.ckpt.prev")
        shutil.copy(copy, out / "c.ckpt")
        resumed = LearnRun(job()).run()
        assert {k: v for k, v in resumed.items() if k not in TIMING - {"labels"}} == \
            {k: v for k, v in reference.items() if k not in TIMING - {"labels"}}
        for name in ("p.jsonl", "m.jsonl"):
            assert (out / name).read_bytes() == (full / name).read_bytes(), name
