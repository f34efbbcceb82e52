"""Redis Streams source and sink against a real redis-server on a loopback port.

The server is the Debian package ``redis-server`` (``.ci/brokers.sh install``); without
it these tests skip with that reason. Semantic checks name the Redis command
documentation they rely on (XREADGROUP, XACK, XPENDING, XAUTOCLAIM, XADD, XDEL).
"""

from __future__ import annotations

import json
import random
import threading
import time

import numpy as np
import pytest

from connectors.base import ResumableSource
from connectors.brokers import open_broker
from connectors.local_brokers import REDIS_SERVER, LocalRedis, free_port
from connectors.quarantine import QuarantineWriter
from connectors.redis_streams import RedisStreamSource, entry_id
from connectors.sinks import open_prediction_sink
from stream.errors import EXIT_INPUT, ConfigError, InputError

SECRET = "rd-Pw-4471x"
pytestmark = pytest.mark.skipif(
    REDIS_SERVER is None,
    reason="redis-server is not installed (bash .ci/brokers.sh install adds it)")


RedisServer = LocalRedis


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    s = RedisServer(tmp_path_factory.mktemp("redis")).start()
    yield s
    s.stop()


_names = iter(range(1, 10**6))


@pytest.fixture
def stream(server):
    """A fresh stream key for each test."""
    return f"tel{next(_names)}"


def source(url, batch_rows, **options):
    """open_broker with a short give-up time, so a broken test fails in seconds."""
    options.setdefault("retry", 5)
    return open_broker(url, batch_rows, **options)


def add(server, stream, n, start=0):
    r = server.client()
    pipe = r.pipeline(transaction=False)
    for i in range(start, start + n):
        pipe.xadd(stream, {"n": str(i), "temp": f"{20 + i % 7}.5", "state": "ok"})
    return [x.decode() for x in pipe.execute()]


def read_all(src, commit=True):
    out = []
    try:
        for batch in src.batches():
            out.append(batch)
            if commit:
                src.commit(batch.position)
    finally:
        src.close()
    return out


def values(batches):
    return [int(v) for b in batches for v in b.frame["n"].tolist()] if batches else []


def pending_count(server, stream, group="sapwood", consumer=None):
    r = server.client()
    if consumer is None:
        return r.xpending(stream, group)["pending"]
    return len(r.xpending_range(stream, group, "-", "+", 10**6, consumername=consumer))


# ---------------------------------------------------------------------------------------
# reading and acknowledging
# ---------------------------------------------------------------------------------------

def test_entries_are_read_in_order_and_stay_pending_until_commit(server, stream):
    ids = add(server, stream, 25)
    src = source(server.url(stream=stream, group="g", consumer="w1"), 10, idle_exit=0)
    assert isinstance(src, ResumableSource) and src.max_uncommitted is None
    batches = list(src.batches())
    assert values(batches) == list(range(25))
    assert np.concatenate([b.lines for b in batches]).tolist() == list(range(1, 26))
    assert [b.position["last_id"] for b in batches] == [ids[9], ids[19], ids[24]]
    assert batches[0].frame.dtypes["temp"] != float  # entries are text; the encoder reads them
    # Redis docs, XREADGROUP: every entry delivered to a consumer stays in the group's
    # pending entries list until XACK; XPENDING (summary form) counts them
    assert pending_count(server, stream, "g") == 25
    src.commit(batches[0].position)
    # Redis docs, XACK: removes the acknowledged ids from the PEL
    r = server.client()
    summary = r.xpending(stream, "g")
    assert summary["pending"] == 15 and summary["min"].decode() == ids[10]
    src.commit(batches[2].position)
    assert pending_count(server, stream, "g") == 0
    src.close()


def test_idle_exit_waits_for_quiet_and_zero_stops_when_drained(server, stream):
    add(server, stream, 3)
    started = time.monotonic()
    assert values(read_all(source(server.url(stream=stream), 100, idle_exit=0))) == [0, 1, 2]
    assert time.monotonic() - started < 2
    started = time.monotonic()
    assert values(read_all(source(server.url(stream=stream), 100, idle_exit=0.6))) == []
    assert time.monotonic() - started >= 0.6


def test_a_new_group_can_start_at_new_entries_only(server, stream):
    add(server, stream, 3)
    url = server.url(stream=stream, group="late", start="$")
    assert values(read_all(source(url, 100, idle_exit=0))) == []
    add(server, stream, 2, start=3)
    assert values(read_all(source(url, 100, idle_exit=0))) == [3, 4]


def test_restart_after_a_crash_learns_every_entry_exactly_once(server, stream):
    """Checkpoint after batch 2 is durable, the process dies before acknowledging it and
    while batch 3 is being learned; more entries arrive while it is down. The restart
    re-reads its pending entries (Redis docs, XREADGROUP: an explicit id such as 0
    returns the consumer's own pending history), acknowledges those the checkpoint holds
    and learns the rest, then goes on with new entries (XREADGROUP with '>')."""
    add(server, stream, 30)
    url = server.url(stream=stream, consumer="w1")
    src = source(url, 10, idle_exit=0)
    it = src.batches()
    b1, b2 = next(it), next(it)
    next(it)  # batch 3: being learned when the process dies
    src.commit(b1.position)  # checkpoint 1 written and acknowledged
    learned = values([b1, b2])  # checkpoint 2 holds these; b3 was being learned
    checkpoint = json.loads(json.dumps(b2.position))  # as stored: JSON
    src.close()  # dies: no commit of checkpoint 2
    assert pending_count(server, stream) == 20
    add(server, stream, 5, start=30)

    again = source(url, 10, idle_exit=0)
    again.seek(checkpoint)
    batches = read_all(again)
    learned += values(batches)
    assert learned == list(range(35))  # none twice, none missing
    assert batches[0].lines[0] == 21  # message numbers go on from the checkpoint
    assert pending_count(server, stream) == 0
    assert values(read_all(source(url, 10, idle_exit=0))) == []


def test_a_dead_consumers_entries_are_claimed(server, stream):
    """Redis docs, XAUTOCLAIM: transfers pending entries idle at least min-idle-time to
    the calling consumer; XPENDING (extended form, per consumer) shows the move."""
    add(server, stream, 12)
    old = source(server.url(stream=stream, consumer="old"), 4, idle_exit=0)
    it = old.batches()
    first, second = next(it), next(it)
    for _ in it:
        pass
    old.commit(first.position)
    old.close()  # dies with entries 4..11 pending; its checkpoint holds 0..7
    assert pending_count(server, stream, consumer="old") == 8

    # claim=false: another learner's pending entries are left alone
    peer = source(server.url(stream=stream, consumer="peer", claim="false"), 100, idle_exit=0)
    assert values(read_all(peer)) == []
    assert pending_count(server, stream, consumer="old") == 8

    new = source(server.url(stream=stream, consumer="new"), 100, idle_exit=0)
    new.seek(second.position)
    assert values(read_all(new)) == [8, 9, 10, 11]
    assert pending_count(server, stream, consumer="old") == 0
    assert pending_count(server, stream) == 0


def test_a_reply_lost_with_the_connection_does_not_skip_entries(server, stream, monkeypatch):
    """The server may assign entries to the consumer (XREADGROUP '>') and the reply be
    lost with the connection; those entries are then pending but unseen. The source
    reads its own pending entries after the last one it handed out before new ones.
    Here the lost reply is that of the read sent ahead while entries 0-2 were handed
    out: it assigned entries 3-5."""
    import redis

    ids = add(server, stream, 6)
    real = redis.connection.Connection.read_response
    dropped = []

    def drop_reply(conn, *args, **kw):
        reply = real(conn, *args, **kw)
        if not dropped and isinstance(reply, list) and reply and \
                isinstance(reply[0], list) and reply[0][0] == stream.encode() and \
                reply[0][1] and reply[0][1][0][0] == ids[3].encode():
            dropped.append(reply)
            conn.disconnect()
            raise redis.ConnectionError("connection reset (test)")
        return reply

    monkeypatch.setattr(redis.connection.Connection, "read_response", drop_reply)
    src = RedisStreamSource(server.url(stream=stream), 3, idle_exit=0, retry=5,
                            rng=random.Random(1), sleep=lambda s: None)
    it = src.batches()
    first = next(it)
    assert values([first]) == [0, 1, 2]
    add(server, stream, 3, start=6)
    rest = list(it)
    src.close()
    assert dropped and values([first] + rest) == list(range(9))
    assert src.reconnects == 1
    assert pending_count(server, stream) == 9      # handed out, not acknowledged here


def test_a_read_sent_ahead_then_set_aside_is_read_again_in_order(server, stream):
    """While a batch is handed out the next read of new entries is already sent; when
    another reading command takes the connection first, that read's reply is set aside
    and the entries it assigned are read from the pending list before newer ones."""
    add(server, stream, 6)
    src = RedisStreamSource(server.url(stream=stream, fence="false"), 3, idle_exit=0,
                            retry=5)
    it = src.batches()
    first = next(it)
    assert values([first]) == [0, 1, 2] and src._in_flight is not None
    src._unread_pending()          # a reading command of its own (XPENDING) goes first
    add(server, stream, 3, start=6)
    rest = list(it)
    src.close()
    assert values([first] + rest) == list(range(9))


# ---------------------------------------------------------------------------------------
# payloads and bad input
# ---------------------------------------------------------------------------------------

def test_bad_entries_go_to_quarantine_with_entry_id_and_reason(server, stream, tmp_path):
    r = server.client()
    ids = [r.xadd(stream, fields).decode() for fields in [
        {"payload": '{"n": 1, "temp": 20.5}'}, {"payload": "not json"},
        {"other": "x"}, {"payload": '{"n": "' + "x" * 300 + '"}'},
        {"payload": "[1]"}, {"payload": '{"n": 2}'}]]
    url = server.url(stream=stream, format="json", max_bytes=200, id_field="entry")
    batches = read_all(source(url, 100, idle_exit=0))
    assert values(batches) == [1, 2]
    assert [e for b in batches for e in b.frame["entry"]] == [ids[0], ids[5]]
    path = tmp_path / "q.jsonl"
    with QuarantineWriter(str(path)) as q:
        for b in batches:
            q.write(b.rejects)
    got = [json.loads(line) for line in path.read_text().splitlines()]
    assert [(e["origin"], e["line"], e["reason"]) for e in got] == [
        (stream, 2, f"is not valid JSON: Expecting value at column 1 (entry {ids[1]})"),
        (stream, 3, f"entry {ids[2]} has no field 'payload'"),
        (stream, 4, f"message is 309 bytes, over the limit of 200 (entry {ids[3]})"),
        (stream, 5, f"record 1 of the message is not a JSON object (entry {ids[4]})"),
    ]


def test_an_entry_deleted_before_it_was_learned_is_reported(server, stream):
    # Redis docs, XREADGROUP: a pending entry deleted from the stream (XDEL) is returned
    # from the PEL with a nil field list
    ids = add(server, stream, 4)
    url = server.url(stream=stream, consumer="w1", claim="false")
    src = source(url, 100, idle_exit=0)
    read_all(src, commit=False)
    server.client().xdel(stream, ids[1])
    batches = read_all(source(url, 100, idle_exit=0))
    assert values(batches) == [0, 2, 3]
    rejects = [r for b in batches for r in b.rejects]
    assert [(r.line, r.reason) for r in rejects] == \
        [(2, f"entry {ids[1]} was deleted from the stream before it was learned")]
    assert pending_count(server, stream) == 0


def test_csv_payloads(server, stream):
    r = server.client()
    for line in ["21.5,open,no", '19,"closed, latched",yes', "1,2"]:
        r.xadd(stream, {"line": line})
    url = server.url(stream=stream, format="csv", field="line", columns="temp,door,fault")
    batches = read_all(source(url, 100, idle_exit=0))
    frame = batches[0].frame
    assert frame.to_dict("list") == {"temp": [21.5, 19.0], "door": ["open", "closed, latched"],
                                     "fault": ["no", "yes"]}
    assert [r.reason.split(" (")[0] for b in batches for r in b.rejects] == \
        ["has 2 fields, expected 3"]


# ---------------------------------------------------------------------------------------
# reconnects and secrets
# ---------------------------------------------------------------------------------------

def test_reconnects_after_the_server_restarts(tmp_path, stream):
    server = RedisServer(tmp_path).start()
    try:
        add(server, stream, 5)
        src = RedisStreamSource(server.url(stream=stream), 100, idle_exit=1.5, retry=20,
                                rng=random.Random(4))
        got, restarted = [], False
        for batch in src.batches():
            got += values([batch])
            src.commit(batch.position)
            if not restarted:
                restarted = True
                server.stop()  # the append-only file keeps stream, group and PEL

                def later():  # down while the source reads: it must retry
                    time.sleep(0.8)
                    server.start()
                    add(server, stream, 5, start=5)

                threading.Thread(target=later, daemon=True).start()
        src.close()
        assert got == list(range(10)) and src.reconnects >= 1
        assert pending_count(server, stream) == 0
    finally:
        server.stop()


def test_an_unreachable_server_is_retried_then_reported():
    port = free_port()
    clock = {"now": 0.0}
    sleeps = []

    def sleep(s):
        sleeps.append(s)
        clock["now"] += s

    src = RedisStreamSource(f"redis://:{SECRET}@127.0.0.1:{port}/0?stream=s", 10,
                            clock=lambda: clock["now"], sleep=sleep, rng=random.Random(2),
                            retry=6)
    with pytest.raises(InputError) as err:
        list(src.batches())
    message = str(err.value)
    assert message.startswith(f"cannot read 'redis://:***@127.0.0.1:{port}/0?stream=s': ")
    assert "gave up trying to connect" in message and SECRET not in message
    assert err.value.exit_code == EXIT_INPUT and len(sleeps) >= 3


def test_passwords_work_and_are_never_shown(tmp_path, stream):
    server = RedisServer(tmp_path, "--requirepass", SECRET).start()
    try:
        server.client(SECRET).xadd(stream, {"n": "5"})
        src = source(server.url(f":{SECRET}@", stream=stream), 10, idle_exit=0)
        assert SECRET not in src.name and ":***@" in src.name
        batches = read_all(src)
        assert values(batches) == [5]
        assert SECRET not in json.dumps([b.position for b in batches])
        wrong = source(server.url(f":{SECRET}x@", stream=stream), 10, idle_exit=0)
        with pytest.raises(InputError) as err:
            list(wrong.batches())
        assert "refused the credentials" in str(err.value)
        assert SECRET not in str(err.value) and ":***@" in str(err.value)
    finally:
        server.stop()


def test_options_are_checked_and_errors_are_redacted(server):
    base = f"redis://:{SECRET}@127.0.0.1:{server.port}"
    cases = [
        (base + "/0", "needs a stream"),
        (base + "/0?stream=s&format=xml", "format must be one of fields, json, csv"),
        (base + "/0?stream=s&format=csv", "format csv needs the column names"),
        (base + "/x?stream=s", "database must be a whole number >= 0, got 'x'"),
        (base + "/0?stream=s&start=soon", "start must be 0, $ or an entry id"),
        (base + "/0?stream=s&strem=t", "unknown option 'strem' for redis sources"),
    ]
    for spec, fragment in cases:
        with pytest.raises(ConfigError) as err:
            source(spec, 10)
        assert fragment in str(err.value)
        assert SECRET not in str(err.value)
    src = source(base + "/0?stream=s&group=g", 10)
    with pytest.raises(ConfigError, match="the checkpoint is for stream 'other'"):
        src.seek({"stream": "other", "group": "g", "last_id": "1-0", "seq": 1})


def test_entry_ids_compare_as_numbers():
    # Redis docs, stream entry ids: <millisecondsTime>-<sequenceNumber>, ordered by
    # time then sequence (so text order is wrong: "9-0" < "10-0")
    assert entry_id("9-0") < entry_id("10-0") < entry_id("10-1") < entry_id(b"11")


# ---------------------------------------------------------------------------------------
# predictions back to a stream
# ---------------------------------------------------------------------------------------

def test_predictions_are_appended_to_a_stream(server, stream):
    import pandas as pd

    frame = pd.DataFrame({"origin": ["tel"] * 3, "line": [1, 2, 3],
                          "predicted": ["ok", "fault", "ok"],
                          "confidence": [0.9, 0.75, np.nan], "rule": ["R1", "R2", "R1"]})
    sink = open_prediction_sink(server.url(stream=stream + "-pred", maxlen=1000))
    sink.write(frame)
    sink.write(frame.iloc[:0])
    sink.close()
    entries = server.client().xrange(stream + "-pred")
    assert [{k.decode(): v.decode() for k, v in fields.items()} for _, fields in entries] == [
        {"origin": "tel", "line": "1", "predicted": "ok", "confidence": "0.9", "rule": "R1"},
        {"origin": "tel", "line": "2", "predicted": "fault", "confidence": "0.75",
         "rule": "R2"},
        {"origin": "tel", "line": "3", "predicted": "ok", "confidence": "", "rule": "R1"},
    ]


def test_learn_reads_a_stream_and_publishes_each_prediction_to_another(server, stream):
    """End to end through the CLI: every entry learned once and predicted once, the
    predictions in entry order on the output stream, the password-free URL in the
    summary (XADD/XRANGE semantics as documented by Redis)."""
    import json

    from click.testing import CliRunner

    from stream.cli.main import cli

    r = server.client()
    pipe = r.pipeline(transaction=False)
    n = 3000
    for i in range(n):
        temp = 15 + (i * 7919) % 200 / 10.0
        pipe.xadd(stream, {"temp": f"{temp:.1f}", "hot": "yes" if temp > 22 else "no"})
    pipe.execute()
    out_key = stream + "-pred"
    runner = CliRunner()
    with runner.isolated_filesystem():
        result = runner.invoke(cli, [
            "learn", server.url(stream=stream, idle_exit=0), "--target", "hot",
            "--predictions", server.url(stream=out_key), "--summary", "s.json", "-q"])
        assert result.exit_code == 0, result.output
        summary = json.loads(open("s.json").read())
    assert summary["records"] == n and summary["learned"] == n
    entries = r.xrange(out_key)
    assert len(entries) == n
    lines = [int(fields[b"line"]) for _, fields in entries]
    assert lines == sorted(lines) and len(set(lines)) == n
    predicted = [fields[b"predicted"].decode() for _, fields in entries]
    # the very first record comes before any class was seen: no prediction (empty field)
    assert predicted[0] == "" and set(predicted[1:]) <= {"yes", "no"}
    # the learnt threshold makes the late predictions right (a one-feature step)
    truth = ["yes" if 15 + (i * 7919) % 200 / 10.0 > 22 else "no" for i in range(n)]
    late = sum(p == t for p, t in zip(predicted[-1000:], truth[-1000:])) / 1000
    assert late > 0.95
    assert summary["outputs"]["predictions"].startswith("redis://")
    assert pending_count(server, stream) == 0


def test_the_quiet_spell_that_ends_a_live_run_is_not_in_its_seconds(server, stream):
    """A broker run ends after ``idle_exit`` quiet seconds; the summary's seconds (and so
    records_per_second) end with the last records learned."""
    import time

    from stream.run.engine import run_learn
    from stream.run.job import LearnJob

    add(server, stream, 500)
    started = time.monotonic()
    summary = run_learn(LearnJob(sources=[server.url(stream=stream, idle_exit=1.5)],
                                 target="state"))
    wall = time.monotonic() - started
    assert summary["learned"] == 500 and wall >= 1.5
    assert summary["seconds"] < wall - 1.0
    assert summary["records_per_second"] == pytest.approx(
        summary["records"] / summary["seconds"], rel=1e-4, abs=0.1)


def test_a_caught_up_run_stops_within_a_second_of_sigterm_with_a_checkpoint(
        server, stream, tmp_path):
    """A learner that has read everything waits in XREADGROUP BLOCK; SIGTERM must end it
    promptly with a checkpoint and every entry acknowledged (XPENDING count 0), exit 0."""
    import signal
    import subprocess
    import sys

    from stream.child_env import same_code_env

    add(server, stream, 2_000)
    ckpt, summary = tmp_path / "run.ckpt", tmp_path / "s.json"
    proc = subprocess.Popen(
        [sys.executable, "-m", "stream.cli", "learn", server.url(stream=stream),
         "--target", "state", "--checkpoint", str(ckpt), "--checkpoint-every", "100000",
         "--summary", str(summary), "-q"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=same_code_env())
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            groups = server.client().xinfo_groups(stream)
            if groups and groups[0]["entries-read"] == 2_000:
                break
            time.sleep(0.05)
        time.sleep(1.0)                       # caught up: nothing more comes
        assert proc.poll() is None
        proc.send_signal(signal.SIGTERM)
        asked = time.monotonic()
        _, err = proc.communicate(timeout=30)
        took = time.monotonic() - asked
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err.decode()
    # generous against a loaded machine; before the fix the run never ended on its own
    assert took < 10, took
    facts = json.loads(summary.read_text())
    assert facts["stopped"] == "SIGTERM" and facts["learned"] == 2_000
    assert facts["checkpoint"]["written"] >= 1 and ckpt.exists()
    assert pending_count(server, stream) == 0


def test_a_command_delivered_late_after_a_network_cut_assigns_nothing_unseen(server, stream):
    """A cut link: the XREADGROUP sent into it reaches the server seconds after the link
    is back (TCP retransmission) and would assign new entries to this consumer on a
    connection nobody reads. The source closes its lost connection on the server
    (CLIENT KILL ID, Redis documentation of CLIENT KILL) before reading its pending
    entries again: every entry is handed out once, in id order, and none stays pending
    unseen (XPENDING)."""
    from tests.connectors.link_cut import CutLink

    link = CutLink(server.port)
    add(server, stream, 20)
    url = f"redis://127.0.0.1:{link.port}/0?stream={stream}"
    src = RedisStreamSource(url, 1000, idle_exit=4, linger=0.2, connect_timeout=0.5,
                            retry=60, rng=random.Random(3))
    got, done = [], threading.Event()
    producing = threading.Event()

    def produce():
        n = 20
        while not producing.wait(0.02):
            add(server, stream, 1, start=n)
            n += 1

    def consume():
        try:
            for batch in src.batches():
                got.append(batch)
                if len(got) == 1:
                    link.cut()      # the next read goes into the cut link
                    threading.Thread(target=produce, daemon=True).start()
                    threading.Timer(2.0, lambda: link.restore(late=1.5)).start()
                    threading.Timer(6.0, producing.set).start()
        finally:
            done.set()

    reader = threading.Thread(target=consume, daemon=True)
    reader.start()
    assert done.wait(60), "the source did not end"
    src.close()
    link.stop()
    numbers = values(got)
    total = server.client().xlen(stream)
    assert src.reconnects >= 1 and total > 40
    assert sorted(numbers) == list(range(total)), "an entry was lost or handed out twice"
    assert numbers == sorted(numbers), "an entry was handed out out of order"


def test_entries_assigned_but_never_seen_are_read_before_an_idle_exit(server, stream):
    """Entries this consumer holds pending but was never handed (assigned on another
    connection, e.g. one the server would not let it close) are read before the source
    ends (XPENDING, extended form, from the last entry handed out)."""
    add(server, stream, 3)
    src = RedisStreamSource(server.url(stream=stream), 100, idle_exit=0.5, retry=5,
                            linger=0.1)
    it = src.batches()
    assert values([next(it)]) == [0, 1, 2]
    add(server, stream, 1, start=3)
    # the same consumer name reads on a connection of its own: entry 3 is now pending
    server.client().xreadgroup("sapwood", "sapwood", {stream: ">"}, count=1)
    rest = list(it)
    src.close()
    assert values(rest) == [3]
