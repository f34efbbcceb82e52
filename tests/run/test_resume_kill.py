"""Kill the learner with SIGKILL at 20 random points and restart it: nothing lost, nothing twice.

``sapwood learn ... --checkpoint C --checkpoint-every 2000`` runs as a subprocess on
60,000 records; it is killed (SIGKILL, no chance to clean up) at 20 seeded random
points of the stream and restarted with the same command each time, then once more to
the end. The final outputs must equal those of one uninterrupted run of the same
command: summary (timings and paths excluded), metrics log and predictions file byte
for byte, drift events (clock times excluded), every snapshot (write times excluded),
the saved model's tables and rules, and the quarantine file. The predictions file must
hold every record's line exactly once.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993; river 0.26.1
``synth.Agrawal(classification_function=2, seed=7)``), written to CSV with ``repr``
floats; every 997th record gets a salary of "abc" (declared numeric, so those records
are quarantined), so the quarantine is exercised too.
A second test does the same with a Redis stream (redis-server, the Debian package) as
the source.

Kill points are record counts: the kill comes when the predictions file has grown past
the byte length that record's line ends at in the uninterrupted run's file (the
predictions are deterministic), so the kills land while the learner works, not while
Python starts; how far past depends on scheduling (up to a few batches).
"""

from __future__ import annotations

import csv
import itertools
import json
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
from river.datasets import synth

from connectors.local_brokers import REDIS_SERVER, LocalRedis
from stream.child_env import same_code_env
from stream.run.saved_model import load_model
from stream.views.rule_sources import load_rules

pytestmark = pytest.mark.slow

N = 60_000
KILLS = 20
SEED = 20_261_202
TIMING = {"seconds", "records_per_second", "startup_seconds", "outputs", "checkpoint",
          "stopped", "sources"}


@pytest.fixture
def scratch():
    """A directory of this test's own: pytest removes older numbered temporary
    directories when other sessions start, which a test this long can outlive."""
    directory = Path(tempfile.mkdtemp(prefix="sapwood-kill-"))
    yield directory
    shutil.rmtree(directory, ignore_errors=True)


def write_agrawal(path: Path, n: int = N) -> list[dict]:
    rows = []
    for i, (x, y) in enumerate(itertools.islice(
            synth.Agrawal(classification_function=2, seed=7), n)):
        row = {k: repr(float(v)) for k, v in x.items()}
        if i % 997 == 500:
            row["salary"] = "abc"
        row["class"] = str(y)
        rows.append(row)
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.DictWriter(out, list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return rows


def command(source: str, out: Path, extra: list[str] = ()) -> list[str]:
    return [sys.executable, "-m", "stream.cli", "learn", source, "--target", "class",
            "--checkpoint", str(out / "run.ckpt"), "--checkpoint-every", "2000",
            "--checkpoint-seconds", "0", "--metrics", str(out / "metrics.jsonl"),
            "--metrics-every", "500", "--predictions", str(out / "predictions.jsonl"),
            "--events", str(out / "events.jsonl"), "--snapshots", str(out / "snapshots"),
            "--snapshot-every", "5000", "--save", str(out / "model.sap"),
            "--summary", str(out / "summary.json"), "--quarantine",
            str(out / "quarantine.jsonl"), "--batch-rows", "500", "-q",
            "--kind", "salary=numeric", *extra]


def line_ends(path: Path) -> np.ndarray:
    data = np.frombuffer(path.read_bytes(), np.uint8)
    return np.flatnonzero(data == 10) + 1


def kill_and_restart(cmd: list[str], predictions: Path, ends: np.ndarray,
                     seed: int) -> dict:
    """Run ``cmd`` with SIGKILLs at ``KILLS`` random record counts, then to the end."""
    rng = random.Random(seed)
    points, at = [], rng.randint(500, 2500)
    for _ in range(KILLS):
        points.append(at)
        at += rng.randint(1500, 3800)
    assert points[-1] < N
    kills, finished_early = 0, 0
    for point in points:
        threshold = int(ends[point - 1])
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                env=same_code_env())
        while proc.poll() is None:
            if predictions.exists() and predictions.stat().st_size >= threshold:
                proc.send_signal(signal.SIGKILL)
                break
            time.sleep(0.002)
        _, err = proc.communicate()
        if proc.returncode == -signal.SIGKILL:
            kills += 1
        else:
            assert proc.returncode == 0, err.decode()
            finished_early += 1
    done = subprocess.run(cmd, capture_output=True, env=same_code_env())
    assert done.returncode == 0, done.stderr.decode()
    return {"kills": kills, "finished_early": finished_early, "points": points}


def snapshot_documents(directory: Path) -> list:
    found = []
    for path in sorted(directory.iterdir()):
        if path.suffix == ".json" and path.name != "index.json":
            doc = json.loads(path.read_text())
            doc.pop("written_at")
            for event in doc["events"]:
                if event["time_source"] == "clock":
                    event.pop("time")
            found.append((path.name, doc))
        elif path.suffix == ".txt":
            found.append((path.name, [line for line in path.read_text().splitlines()
                                      if "T" not in line or "Z" not in line]))
    index = json.loads((directory / "index.json").read_text())
    for entry in index["snapshots"]:
        entry.pop("written_at")
    return found + [("index", index)]


def events_without_clock(path: Path) -> list[dict]:
    rows = [json.loads(line) for line in path.read_text().splitlines()]
    for row in rows:
        if row["time_source"] == "clock":
            row.pop("time")
    return rows


def assert_same_outcome(ref: Path, run: Path, lines_expected: set) -> None:
    a, b = (json.loads((d / "summary.json").read_text()) for d in (ref, run))
    assert {k: v for k, v in b.items() if k not in TIMING} == \
        {k: v for k, v in a.items() if k not in TIMING}
    assert b["records"] == N and b["learned"] + b["quarantined"] == N
    for name in ("metrics.jsonl", "predictions.jsonl", "quarantine.jsonl"):
        assert (run / name).read_bytes() == (ref / name).read_bytes(), name
    assert events_without_clock(run / "events.jsonl") == \
        events_without_clock(ref / "events.jsonl")
    assert snapshot_documents(run / "snapshots") == snapshot_documents(ref / "snapshots")
    assert load_rules(str(run / "model.sap")) == load_rules(str(ref / "model.sap"))
    model_a, model_b = (load_model(str(d / "model.sap")).model for d in (ref, run))
    tables_a, tables_b = model_a.state()[1], model_b.state()[1]
    assert tables_a.keys() == tables_b.keys()
    for name in tables_a:
        # scratch tables (stream/tables.py): free_* are stacks of recycled ids, events_*
        # a buffer emptied after every learn call; what lies beyond their tops is stale
        # or uninitialised memory that is never read
        if not name.startswith(("free_", "events_")):
            np.testing.assert_array_equal(tables_b[name], tables_a[name], err_msg=name)
    probe = np.random.default_rng(0).uniform(0, 1, (2000, len(model_a.feature_names)))
    probe *= np.array([150_000, 75_000, 60, 4, 20, 9, 900_000, 30, 500_000])
    scored_a, scored_b = model_a.predict(probe), model_b.predict(probe)
    for field in ("pred", "confidence", "leaf"):
        np.testing.assert_array_equal(getattr(scored_b, field), getattr(scored_a, field))
    # every record once: learned ones in the predictions, bad ones in the quarantine
    seen = [(r["origin"], r["line"]) for r in map(json.loads, (run / "predictions.jsonl")
                                                   .read_text().splitlines())]
    seen += [(r["origin"], r["line"]) for r in map(json.loads, (run / "quarantine.jsonl")
                                                    .read_text().splitlines())]
    assert len(seen) == len(set(seen)) == N
    assert set(seen) == lines_expected


def test_file_stream_killed_twenty_times_equals_uninterrupted(scratch):
    tmp_path = scratch
    data = tmp_path / "agrawal.csv"
    write_agrawal(data)
    ref, run = tmp_path / "ref", tmp_path / "run"
    ref.mkdir()
    run.mkdir()
    started = time.monotonic()
    # the uninterrupted run (it also warms the compiled-code cache for the others)
    done = subprocess.run(command(str(data), ref), capture_output=True, env=same_code_env())
    assert done.returncode == 0, done.stderr.decode()
    outcome = kill_and_restart(command(str(data), run), run / "predictions.jsonl",
                               line_ends(ref / "predictions.jsonl"), SEED)
    assert outcome["kills"] >= KILLS - 2, outcome
    summary = json.loads((run / "summary.json").read_text())
    # the first checkpoint comes after the schema is inferred (10,000 records)
    early = sum(point < 10_000 for point in outcome["points"])
    assert summary["checkpoint"]["resumes"] >= outcome["kills"] - early
    assert_same_outcome(ref, run, {(str(data), line) for line in range(2, N + 2)})
    print(f"file kill test: {outcome}, {time.monotonic() - started:.1f} s")


# ------------------------------------------------------------------------------ Redis



@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                    "(bash .ci/brokers.sh install adds it)")
def test_redis_stream_killed_twenty_times_equals_uninterrupted(scratch):
    tmp_path = scratch
    pytest.importorskip("redis")

    server = LocalRedis(tmp_path).start()
    try:
        rows = write_agrawal(tmp_path / "agrawal.csv")
        client = server.client()
        pipe = client.pipeline(transaction=False)
        for i, row in enumerate(rows):
            pipe.xadd("agrawal", row)
            if i % 5000 == 4999:
                pipe.execute()
        pipe.execute()
        assert client.xlen("agrawal") == N
        ref, run = tmp_path / "ref", tmp_path / "run"
        ref.mkdir()
        run.mkdir()
        url = f"redis://127.0.0.1:{server.port}/0?stream=agrawal&idle_exit=0&group="
        started = time.monotonic()
        done = subprocess.run(command(url + "reference", ref), capture_output=True,
                              env=same_code_env())
        assert done.returncode == 0, done.stderr.decode()
        outcome = kill_and_restart(command(url + "killed", run), run / "predictions.jsonl",
                                   line_ends(ref / "predictions.jsonl"), SEED + 1)
        assert outcome["kills"] >= KILLS - 2, outcome
        assert_same_outcome(ref, run, {("agrawal", line) for line in range(1, N + 1)})
        # everything learned was acknowledged, nothing else is pending
        pending = client.xpending("agrawal", "killed")
        assert pending["pending"] == 0
        print(f"redis kill test: {outcome}, {time.monotonic() - started:.1f} s")
    finally:
        server.stop()
