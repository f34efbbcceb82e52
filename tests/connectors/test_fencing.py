"""Fencing of Redis stream learners against a real redis-server on loopback.

A learner that was cut off and replaced must not acknowledge or checkpoint after its
replacement started (the fencing-token scheme of Kleppmann, "How to do distributed
locking", 2016: the store checks the token). The checks use the documented atomicity
of Redis scripts (EVAL: "no other script or Redis command will be executed while a
script is executing", quoted from memory) and the pending-entries semantics of
XREADGROUP/XPENDING.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time

import pytest

from connectors.brokers import open_broker
from connectors.local_brokers import REDIS_SERVER
from connectors.redis_streams import entry_id as parse_entry_id
from stream.errors import EXIT_SUPERSEDED, SupersededError
from tests.connectors.redis_records import add_hot_records, learn_numbers

pytestmark = pytest.mark.skipif(
    REDIS_SERVER is None,
    reason="redis-server is not installed (bash .ci/brokers.sh install adds it)")


@pytest.fixture(scope="module")
def server(plain_redis):
    return plain_redis


_names = iter(range(1, 10**6))


@pytest.fixture
def stream(server):
    return f"fenced{next(_names)}"


def add(server, stream, n, start=0):
    add_hot_records(server.client(), stream, n, start)


def pending(server, stream):
    return server.client().xpending(stream, "sapwood")["pending"]


def test_a_replaced_learner_can_neither_acknowledge_nor_pass_its_checks(server, stream):
    add(server, stream, 300)
    old = open_broker(server.url(stream=stream), 100, retry=5)
    batches = old.batches()
    first = next(batches)
    old.commit(first.position)            # its own epoch: acknowledged
    # (the read it sent ahead of the run holds the next batch pending)
    last = parse_entry_id(first.position["last_id"])
    held = server.client().xpending_range(stream, "sapwood", "-", "+", 1000)
    assert held and all(parse_entry_id(e["message_id"]) > last for e in held)
    second = next(batches)                 # handed out, not acknowledged
    new = open_broker(server.url(stream=stream, idle_exit=0), 1000, retry=5)
    got = learn_numbers(new)
    # the replacement read what the old one held unacknowledged, then the rest
    assert got == list(range(100, 300))
    # the acknowledgement is sent and refused by the server (the script compares the
    # epoch); the refusal is read before anything else the old learner does
    old.commit(second.position)
    with pytest.raises(SupersededError, match="another learner of this stream"):
        old.fence_check()
    with pytest.raises(SupersededError):
        old.fence_check()                  # its own check of the epoch
    old.close()
    assert pending(server, stream) == 0
    assert old.fence.epoch + 1 == new.fence.epoch


def test_entries_a_replaced_learner_reads_are_read_again_in_order(server, stream):
    """The old learner, still running under the same consumer name, takes new entries
    into the shared pending list; the replacement notices the gap before its next new
    entries and reads them all from the pending list, in id order."""
    add(server, stream, 100)
    old = open_broker(server.url(stream=stream), 50, retry=5)
    old_batches = old.batches()
    next(old_batches)
    new = open_broker(server.url(stream=stream, idle_exit=1), 50, retry=5)
    new_batches = new.batches()
    got = []
    while len(got) < 100:
        got += next(new_batches).frame["n"].astype(int).tolist()
    add(server, stream, 100, start=100)
    next(old_batches)   # the superseded learner took new entries 100-149 (and, seeing
    # pending entries before them, went back to read 50-99 from the pending list)
    assert server.client().xinfo_groups(stream)[0]["entries-read"] == 150
    for batch in new_batches:
        got += batch.frame["n"].astype(int).tolist()
        new.commit(batch.position)
    assert got == list(range(200))
    assert pending(server, stream) == 0
    old.close()
    new.close()


def test_fencing_can_be_turned_off(server, stream):
    add(server, stream, 10)
    src = open_broker(server.url(stream=stream, fence="false", idle_exit=0), 100, retry=5)
    for batch in src.batches():
        src.commit(batch.position)
    src.close()
    assert src.fence is None and pending(server, stream) == 0
    assert not server.client().keys(f"*{stream}*sapwood-fence*")


def test_a_learner_cut_off_and_replaced_writes_nothing_after_its_replacement(
        server, stream, tmp_path):
    """Real processes: learner 1 is frozen (SIGSTOP, as a cut-off node would be) while it
    waits for entries; more entries arrive; learner 2, the same command, resumes from
    the checkpoint, learns them and is stopped. Thawed and stopped, learner 1 must exit
    with code 4 and the superseded message, leaving the checkpoint, the summary and the
    predictions as learner 2 wrote them; those equal an uninterrupted run's. Without
    fencing learner 1 would write its older state over the checkpoint as it stops."""
    import redis

    from stream.child_env import same_code_env

    env = same_code_env()
    add(server, stream, 3000)
    reference_db = redis.Redis(port=server.port, db=1, protocol=2)
    pipe = reference_db.pipeline(transaction=False)
    for entry_id, fields in server.client().xrange(stream):
        pipe.xadd(stream, fields)
    pipe.execute()

    def command(url, out):
        return [sys.executable, "-m", "stream.cli", "learn", url, "--target", "hot",
                "--batch-rows", "500", "--checkpoint", str(out / "run.ckpt"),
                "--checkpoint-every", "1000", "--predictions", str(out / "p.csv"),
                "--summary", str(out / "s.json"), "-q"]

    def wait_until_learned(n):
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            groups = server.client().xinfo_groups(stream)
            if groups and groups[0]["entries-read"] == n and pending(server, stream) == 0:
                return                  # learned, checkpointed, acknowledged
            time.sleep(0.05)
        raise AssertionError(f"{n} entries were not learned within 60 s")

    run, ref = tmp_path / "run", tmp_path / "ref"
    run.mkdir()
    ref.mkdir()
    url = server.url(stream=stream)
    first = subprocess.Popen(command(url, run), env=env, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE)
    second = None
    try:
        wait_until_learned(3000)
        first.send_signal(signal.SIGSTOP)       # frozen while it waits for entries
        add(server, stream, 1000, start=3000)
        second = subprocess.Popen(command(url, run), env=env, stdout=subprocess.DEVNULL,
                                  stderr=subprocess.PIPE)
        wait_until_learned(4000)
        second.send_signal(signal.SIGTERM)
        _, err2 = second.communicate(timeout=60)
        assert second.returncode == 0, err2.decode()
        written = {name: (run / name).read_bytes() for name in ("run.ckpt", "p.csv",
                                                                "s.json")}
        first.send_signal(signal.SIGCONT)
        try:
            # a read it had sent before it froze may have been answered with new entries
            # meanwhile: it finds itself superseded before writing their outputs
            _, err = first.communicate(timeout=3)
        except subprocess.TimeoutExpired:
            first.send_signal(signal.SIGTERM)   # a stop writes a last checkpoint
            _, err = first.communicate(timeout=60)
    finally:
        for proc in (first, second):
            if proc is not None and proc.poll() is None:
                proc.kill()
                proc.wait()
    assert first.returncode == EXIT_SUPERSEDED, err.decode()
    assert "another learner of this stream has started" in err.decode()
    assert {name: (run / name).read_bytes() for name in written} == written

    add_reference = reference_db.pipeline(transaction=False)
    for entry_id, fields in server.client().xrange(stream, min="(" + entry_id.decode()):
        add_reference.xadd(stream, fields)
    add_reference.execute()
    done = subprocess.run(command(url.replace("/0?", "/1?") + "&idle_exit=0", ref),
                          env=env, capture_output=True, timeout=120)
    assert done.returncode == 0, done.stderr.decode()
    assert (run / "p.csv").read_bytes() == (ref / "p.csv").read_bytes()
    facts = json.loads((run / "s.json").read_text())
    reference = json.loads((ref / "s.json").read_text())
    for key in ("records", "learned", "accuracy"):
        assert facts[key] == reference[key], key
    assert facts["learned"] == 4000
    assert pending(server, stream) == 0


def test_a_user_who_may_not_fence_is_told_how_to_go_on(server, stream):
    """An ACL user without INCR (Redis ACL documentation: ACL SETUSER ... -incr) is
    refused at start with the key and the way out; fence=false then reads."""
    from stream.errors import InputError

    add(server, stream, 5)
    server.client().execute_command("ACL", "SETUSER", "nofence", "on", ">pw-7Q", "~*",
                                    "&*", "+@all", "-incr")
    url = server.url(userinfo="nofence:pw-7Q@", stream=stream, idle_exit=0)
    src = open_broker(url, 100, retry=2)
    with pytest.raises(InputError, match="add fence=false to the URL") as caught:
        next(src.batches())
    assert "sapwood-fence" in str(caught.value) and "pw-7Q" not in str(caught.value)
    src.close()
    src = open_broker(url + "&fence=false", 100, retry=2)
    got = sum(len(b.frame) for b in src.batches())
    src.close()
    assert got == 5


def test_a_superseded_run_writes_no_output_of_its_next_batch(server, stream, tmp_path):
    """Once a later learner took the epoch, the run checks before each batch's outputs:
    the predictions hold exactly the batches learned before (the epoch is taken from
    the progress callback after the third batch, so the point is exact; no checkpoint
    falls due before the end, so without the check the run would write all 1,000
    predictions and be stopped only by its last checkpoint)."""
    from stream.run.engine import LearnRun
    from stream.run.job import LearnJob

    add(server, stream, 1000)
    predictions = tmp_path / "p.csv"
    batches = []

    def after_batch(facts):
        batches.append(facts)
        if len(batches) == 3:      # a replacement starts: it takes the next epoch
            key = next(k for k in server.client().keys(f"*{stream}*sapwood-fence*"))
            server.client().incr(key)

    job = LearnJob(sources=[server.url(stream=stream, idle_exit=0)], target="hot",
                   batch_rows=100, predictions_path=str(predictions),
                   checkpoint_path=str(tmp_path / "run.ckpt"), checkpoint_every=100_000,
                   checkpoint_seconds=0)
    with pytest.raises(SupersededError):
        LearnRun(job, progress=after_batch).run()
    lines = predictions.read_text().splitlines()
    assert len(lines) == 1 + 300           # the header and the three batches
    assert not (tmp_path / "run.ckpt").exists()
    assert pending(server, stream) >= 400   # read, never acknowledged
