"""The grove on a real two-node Ray cluster, under failures: every key ends exactly as a
single-process run of the same records.

Real processes only: a Ray head and a worker node, each in a network namespace the test
creates (tests/grove/two_nodes.py), Redis on the head, the grove's folder shared (one
machine). For each failure, (a) one learner's actor process killed, (b) every process of
the worker node killed, (c) the worker's link cut for 45 s and (d) for 90 s, each
learner's outputs are compared with a single-process ``sapwood learn`` of the same
stream's records on a Redis server of the test's own (no Ray, no failure), stopped the
same way: per key the predictions, metrics and drift events byte for byte, the rules of
every snapshot, and the figures of the index of keys; each record learned once; nothing
left pending in Redis.

Sources: the records are river's Agrawal generator (Agrawal, Imielinski & Swami, 1993;
river 0.26.1 ``synth.Agrawal``), keyed by its car make ``car`` (20 values, nominal in the
generator's documentation) and routed to 3 streams (9, 7 and 4 keys) by ``stream_for`` (CRC-32, ISO 3309, as zlib computes it). The
reference is sapwood's own single-process keyed run, which tests/run/test_keyed.py checks
against river's HoeffdingTreeClassifier key by key.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from river.datasets import synth

from connectors.local_brokers import LocalRedis
from stream.child_env import same_code_env
from stream.grove.control import learner_figures
from stream.grove.plan import make_plan, read_plan, stream_for, write_plan

from .two_nodes import TwoNodes, why_not

REASON = why_not()
pytestmark = [pytest.mark.skipif(REASON is not None, reason=str(REASON)),
              pytest.mark.slow]

RECORDS = 24_000
STREAMS = [f"plant:{i}" for i in range(3)]
LEARN_ARGS = ("--checkpoint-seconds 1 --snapshot-every 400 --metrics-every 200 "
              "--batch-rows 500 --kind elevel=category --kind zipcode=category")
FIGURES = ("records", "learned", "quarantined", "accuracy", "kappa", "leaves", "depth",
           "concern_recall", "window_accuracy", "drift_alarms", "swaps")


def agrawal_entries() -> dict[str, list[dict]]:
    """The records of each stream, in order (floats in ``repr``: exact through Redis)."""
    routed: dict[str, list[dict]] = {s: [] for s in STREAMS}
    for x, y in itertools.islice(synth.Agrawal(classification_function=2, seed=5),
                                 RECORDS):
        row = {k: repr(float(v)) if isinstance(v, float) else str(v) for k, v in x.items()}
        row["class"] = str(y)
        routed[stream_for(row["car"], "plant:", len(STREAMS))].append(row)
    return routed


@pytest.fixture(scope="module")
def entries():
    return agrawal_entries()


def add(client, stream: str, rows: list[dict]) -> None:
    pipe = client.pipeline(transaction=False)
    for row in rows:
        pipe.xadd(stream, row)
    pipe.execute()


def wait_learned(home: Path, counts: dict[str, int], seconds: float) -> list[dict]:
    """Wait until each learner's last checkpoint holds all of its stream's records."""
    plan = read_plan(str(home))
    deadline = time.monotonic() + seconds
    while True:
        rows = [learner_figures(str(home), learner) for learner in plan.learners]
        if all(r["records"] == counts[r["stream"]] for r in rows):
            return rows
        if time.monotonic() > deadline:
            raise AssertionError(f"not all records learned in {seconds} s: "
                                 f"{[(r['stream'], r['records'], r.get('status')) for r in rows]}"
                                 f" of {counts}")
        time.sleep(0.5)


@pytest.fixture(scope="module")
def reference(entries, tmp_path_factory):
    """Each stream learned by one ``sapwood learn`` on a loopback Redis server, stopped
    with SIGTERM once everything is checkpointed, as the grove's learners are."""
    folder = tmp_path_factory.mktemp("grove-reference")
    (folder / "redis").mkdir()
    server = LocalRedis(folder / "redis", durable=False).start()
    children: list[subprocess.Popen] = []
    try:
        client = server.client()
        for stream, rows in entries.items():
            add(client, stream, rows)
        plan = make_plan("reference", server.url(), STREAMS, "class", "car",
                         LEARN_ARGS, 1.0)
        home = folder / "home"
        for learner in plan.learners:
            plan.make_folder(str(home), learner)
            children.append(subprocess.Popen(
                [sys.executable, "-m", "stream.cli", *plan.learn_command(str(home), learner)],
                env=same_code_env()))
        write_plan(str(home), plan)
        wait_learned(home, {s: len(r) for s, r in entries.items()}, 120)
        for child in children:
            child.send_signal(signal.SIGTERM)
        assert [child.wait(60) for child in children] == [0] * len(children)
    finally:
        for child in children:
            if child.poll() is None:
                child.kill()
                child.wait()
        server.stop()
    return home


def snapshots(folder: Path) -> list[tuple]:
    """(sequence, records, rules) of every snapshot of a key."""
    index = json.loads((folder / "index.json").read_text())
    found = []
    for entry in sorted(index["snapshots"], key=lambda e: e["sequence"]):
        document = json.loads((folder / entry["json"]).read_text())
        found.append((entry["sequence"], document.get("records"), document["rules"]))
    return found


def assert_same_as_reference(home: Path, reference: Path, entries: dict) -> None:
    plan = read_plan(str(home))
    for learner in plan.learners:
        ours, theirs = home / learner.folder, reference / learner.folder
        index = json.loads((ours / "rules" / "keys.json").read_text())
        wanted = json.loads((theirs / "rules" / "keys.json").read_text())
        assert sorted(k["key"] for k in index["keys"]) == \
            sorted(k["key"] for k in wanted["keys"]), learner.stream
        by_key = {k["key"]: k for k in wanted["keys"]}
        for key in index["keys"]:
            name, folder = key["key"], key["folder"]
            assert {f: key.get(f) for f in FIGURES} == \
                {f: by_key[name].get(f) for f in FIGURES}, (learner.stream, name)
            for output in ("predictions.jsonl", "metrics.jsonl", "events.jsonl"):
                a = (ours / "out" / folder / output).read_bytes()
                b = (theirs / "out" / folder / output).read_bytes()
                assert a == b, (learner.stream, name, output)
            lines = [json.loads(line)["line"] for line in
                     (ours / "out" / folder / "predictions.jsonl").read_text().splitlines()]
            assert len(lines) == len(set(lines)) == sum(
                1 for row in entries[learner.stream] if row["car"] == name)
            assert snapshots(ours / "rules" / folder) == \
                snapshots(theirs / "rules" / folder), (learner.stream, name)


class Feeder:
    """Adds the rest of each stream's records in small steps from a thread."""

    def __init__(self, client, rest: dict[str, list[dict]], step: int = 150,
                 pause: float = 0.2) -> None:
        self._thread = threading.Thread(target=self._run, args=(client, rest, step, pause),
                                        daemon=True)
        self.error: BaseException | None = None
        self._thread.start()

    def _run(self, client, rest, step, pause) -> None:
        try:
            longest = max(len(rows) for rows in rest.values())
            for at in range(0, longest, step):
                for stream, rows in rest.items():
                    if rows[at:at + step]:
                        add(client, stream, rows[at:at + step])
                time.sleep(pause)
        except BaseException as exc:  # noqa: BLE001 - reported by join()
            self.error = exc

    def join(self) -> None:
        self._thread.join(300)
        assert not self._thread.is_alive() and self.error is None, self.error


def run_with_failure(folder: Path, entries: dict, reference: Path, failure) -> list[dict]:
    """Start the cluster and a grove, feed 40% of the records, apply ``failure`` (given
    the cluster, where the learners are and a function that starts the grove) while the
    rest arrive, wait until all are learned, stop the grove and compare."""
    nodes = TwoNodes(folder)
    try:
        nodes.start()
        client = nodes.redis_client()
        first = {s: rows[:len(rows) * 2 // 5] for s, rows in entries.items()}
        rest = {s: rows[len(rows) * 2 // 5:] for s, rows in entries.items()}
        for stream, rows in first.items():
            add(client, stream, rows)
        home = folder / "grove"

        def start_grove() -> None:
            nodes.sapwood("grove", "start", str(home), *STREAMS, "--redis",
                          nodes.redis_for_learners, "--target", "class", "--by", "car",
                          "--learn-args", LEARN_ARGS, "--address", nodes.ray_address)

        start_grove()
        placed = wait_learned(home, {s: len(r) for s, r in first.items()}, 120)
        on_worker = [r for r in placed if r["node_ip"] == nodes.worker_ip]
        assert on_worker, f"the grove left the worker node empty: {placed}"
        feeder = Feeder(client, rest)
        failure(nodes, placed, start_grove)
        feeder.join()
        wait_learned(home, {s: len(r) for s, r in entries.items()}, 300)
        deadline = time.monotonic() + 90   # an actor may be restarting (a node declared
        while True:                         # dead late) even though all is checkpointed
            status = nodes.sapwood("grove", "status", str(home), "--json", "--address",
                                   nodes.ray_address)
            live = json.loads(status.stdout)["learners"]
            if all(r["alive"] for r in live):
                break
            assert time.monotonic() < deadline, live
            time.sleep(2)
        nodes.sapwood("grove", "stop", str(home), "--address", nodes.ray_address)
        plan = read_plan(str(home))
        assert plan.state == "stopped"
        for stream in STREAMS:
            assert client.xpending(stream, plan.group)["pending"] == 0, stream
    finally:
        nodes.close()
    assert_same_as_reference(home, reference, entries)
    return [learner_figures(str(home), learner) for learner in plan.learners]


def test_a_killed_learner_process_comes_back_and_a_restarted_grove_resumes(
        entries, reference, tmp_path):
    # one actor process killed; once Ray has brought it back, the whole grove stopped and
    # started again with the same command while records keep arriving
    victim: dict = {}

    def kill_one_actor_then_restart_the_grove(nodes: TwoNodes, placed: list[dict],
                                              start_grove) -> None:
        victim.update(next(r for r in placed if r["node_ip"] == nodes.worker_ip))
        os.kill(victim["pid"], signal.SIGKILL)
        home = tmp_path / "grove"
        plan = read_plan(str(home))
        learner = next(x for x in plan.learners if x.name == victim["learner"])
        deadline = time.monotonic() + 60
        while learner_figures(str(home), learner).get("starts") != 2:
            assert time.monotonic() < deadline, "Ray did not bring the learner back"
            time.sleep(0.2)
        nodes.sapwood("grove", "stop", str(home), "--address", nodes.ray_address)
        assert read_plan(str(home)).state == "stopped"
        start_grove()

    after = run_with_failure(tmp_path, entries, reference,
                             kill_one_actor_then_restart_the_grove)
    again = next(r for r in after if r["learner"] == victim["learner"])
    assert again["starts"] == 3 and again["pid"] != victim["pid"]
    assert all(r["status"] == "stopped" and r["child_exit"] == 0 for r in after), after


def test_a_lost_node_moves_its_learners_and_misses_nothing(entries, reference, tmp_path):
    moved: dict[str, str] = {}

    def kill_worker_node(nodes: TwoNodes, placed: list[dict], _start) -> None:
        moved.update((r["learner"], r["node_ip"]) for r in placed
                     if r["node_ip"] == nodes.worker_ip)
        assert nodes.kill_node(nodes.worker) > 0

    after = run_with_failure(tmp_path, entries, reference, kill_worker_node)
    for row in after:
        if row["learner"] in moved:
            assert row["starts"] >= 2 and row["node_ip"] != moved[row["learner"]], row


@pytest.mark.parametrize("seconds", [45, 90])
def test_a_cut_worker_link_misses_and_doubles_nothing(entries, reference, tmp_path,
                                                      seconds):
    def cut_link(nodes: TwoNodes, placed: list[dict], _start) -> None:
        nodes.cut()
        time.sleep(seconds)
        nodes.restore()

    after = run_with_failure(tmp_path, entries, reference, cut_link)
    print({r["learner"]: (r["node_ip"], r["starts"], r.get("child_runs")) for r in after})
