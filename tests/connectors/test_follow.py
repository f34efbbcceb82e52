"""Follow mode (connectors/follow.py, open_sources(follow=...), sapwood learn --follow).

A writer thread appends to, rotates and truncates a file while the reader follows it;
every record must come out exactly once, in order, with line numbers counted per file,
and never a half-written line. Rotation is done as ``logrotate`` does it with its
``create`` method (rename, then a new file under the old name) and ``copytruncate``
(copy, then truncate in place); both behaviours are from the logrotate manual (from
memory) and common practice for log shippers. The stop request (SIGTERM in the CLI)
must end a run cleanly with a checkpoint and exit code 0, and the same command must go
on from there.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from connectors.follow import FollowControl, FollowStopped, GrowingFile
from connectors.sources import open_sources
from stream.child_env import same_code_env
from stream.errors import ConfigError

POLL = 0.01


def records(batches) -> list[tuple[str, int, int]]:
    """(origin, line, value of column n) of every record."""
    out = []
    for b in batches:
        out += [(b.origin, line, int(v)) for line, v in zip(b.lines.tolist(), b.frame["n"])]
    return out


def follow(paths, control, fmt=None, rows=1000, position=None) -> list:
    """Read in follow mode until the control ends it; the batches read."""
    source = open_sources([str(p) for p in paths], fmt, rows, follow=control)
    if position is not None:
        source.seek(position)
    got = []
    try:
        for batch in source.batches():
            got.append(batch)
    except FollowStopped as stop:
        control.reason = stop.reason
    return got


def writer(steps):
    """Run ``steps`` (callables) in a thread, a short pause between them."""
    def work():
        for step in steps:
            time.sleep(0.05)
            step()
    thread = threading.Thread(target=work)
    thread.start()
    return thread


def append(path: Path, text: str):
    def step():
        with open(path, "a", encoding="utf-8") as out:
            out.write(text)
            out.flush()
    return step


def lines_of(start: int, stop: int) -> str:
    return "".join(f"{i},{i % 7}\n" for i in range(start, stop))


def test_appended_lines_are_read_once_and_half_lines_wait(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("n,m\n" + lines_of(0, 10))
    control = FollowControl(poll_seconds=POLL, idle_exit=0.6)
    thread = writer([append(path, lines_of(10, 20)), append(path, "20,"),  # half a line
                     append(path, "6\n" + lines_of(21, 30)), append(path, "30,2")])
    got = records(follow([path], control))
    thread.join()
    assert control.reason == "idle"
    # the last line has no line break yet: a writer may still be writing it
    assert got == [(str(path), i + 2, i) for i in range(30)]


def test_rotation_reads_the_old_file_to_its_end_then_the_new_one(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("n,m\n" + lines_of(0, 5))

    def rotate():
        with open(path, "a") as out:   # written just before the switch
            out.write(lines_of(5, 8))
        os.rename(path, tmp_path / "feed.csv.1")

    thread = writer([append(path, lines_of(3, 3)), rotate,
                     lambda: path.write_text("n,m\n" + lines_of(8, 12)),
                     append(path, lines_of(12, 15))])
    control = FollowControl(poll_seconds=POLL, idle_exit=0.6)
    got = records(follow([path], control))
    thread.join()
    # line numbers restart in the new file; its header is read again, not learned
    assert got == [(str(path), i + 2, i) for i in range(8)] + \
        [(str(path), i - 6, i) for i in range(8, 15)]


def test_a_rotated_file_without_a_header_keeps_the_columns(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("n,m\n" + lines_of(0, 3))
    thread = writer([lambda: os.rename(path, tmp_path / "old.csv"),
                     lambda: path.write_text(lines_of(3, 6))])
    control = FollowControl(poll_seconds=POLL, idle_exit=0.5)
    got = records(follow([path], control))
    thread.join()
    assert [r[2] for r in got] == list(range(6))
    assert [r[1] for r in got[3:]] == [1, 2, 3]


def test_truncation_in_place_reads_the_file_again_from_its_start(tmp_path):
    path = tmp_path / "feed.jsonl"
    path.write_text("".join(json.dumps({"n": i}) + "\n" for i in range(4)))

    def copytruncate():
        (tmp_path / "feed.jsonl.1").write_bytes(path.read_bytes())
        with open(path, "r+") as out:
            out.truncate(0)

    thread = writer([copytruncate, append(path, json.dumps({"n": 4}) + "\n"),
                     append(path, json.dumps({"n": 5}) + "\n")])
    control = FollowControl(poll_seconds=POLL, idle_exit=0.5)
    got = records(follow([path], control))
    thread.join()
    assert got == [(str(path), i + 1, i) for i in range(4)] + \
        [(str(path), 1, 4), (str(path), 2, 5)]


def test_rewritten_past_the_offset_between_two_polls_is_seen(tmp_path):
    """Truncated and refilled beyond the read offset before the next poll: the size
    alone cannot tell, the bytes before the offset can."""
    path = tmp_path / "feed.jsonl"
    path.write_text("".join(json.dumps({"n": i}) + "\n" for i in range(3)))
    fresh = "".join(json.dumps({"n": i}) + "\n" for i in range(100, 110))
    control = FollowControl(poll_seconds=0.3, idle_exit=1.0)
    thread = writer([lambda: path.write_text(fresh)])  # truncates, refills, in one go
    got = records(follow([path], control))
    thread.join()
    assert [r[2] for r in got] == [0, 1, 2] + list(range(100, 110))


def test_a_followed_file_may_appear_later(tmp_path):
    path = tmp_path / "late.csv"
    control = FollowControl(poll_seconds=POLL, idle_exit=0.6)
    thread = writer([lambda: path.write_text("n,m\n" + lines_of(0, 4))])
    got = records(follow([path], control))
    thread.join()
    assert [r[2] for r in got] == [0, 1, 2, 3]


def test_the_stop_request_ends_a_wait_at_once(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("n,m\n" + lines_of(0, 3))
    control = FollowControl(poll_seconds=30.0)
    threading.Timer(0.2, control.stop.set).start()
    started = time.monotonic()
    got = records(follow([path], control))
    assert control.reason == "stop" and len(got) == 3
    assert time.monotonic() - started < 5


def test_resume_after_a_rotation_while_stopped_finishes_the_old_file(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("n,m\n" + lines_of(0, 6))
    control = FollowControl(poll_seconds=POLL, idle_exit=0.2)
    first = follow([path], control, rows=4)
    assert [r[2] for r in records(first)] == list(range(6))
    position = json.loads(json.dumps(first[0].position))   # after 4 records
    with open(path, "a") as out:
        out.write(lines_of(6, 9))
    os.rename(path, tmp_path / "feed.csv.1")
    path.write_text("n,m\n" + lines_of(9, 12))
    again = follow([path], FollowControl(poll_seconds=POLL, idle_exit=0.3), rows=4,
                   position=position)
    assert [r[2] for r in records(again)] == list(range(4, 12))


def test_follow_mode_needs_a_plain_file(tmp_path):
    import gzip

    packed = tmp_path / "feed.csv.gz"
    with gzip.open(packed, "wt") as out:
        out.write("n,m\n1,2\n")
    with pytest.raises(ConfigError, match="follow mode reads plain text as it grows; "
                                          ".*feed.csv.gz' is gzip-compressed"):
        open_sources([str(packed)], follow=FollowControl())
    with pytest.raises(ConfigError, match="standard input is read to its end anyway"):
        open_sources(["-"], follow=FollowControl())


def test_growing_file_is_a_live_stream(tmp_path):
    path = tmp_path / "x"
    path.write_bytes(b"abc")
    stream = GrowingFile(str(path), FollowControl(poll_seconds=POLL, idle_exit=0.1),
                         open(path, "rb", buffering=0))
    assert stream.live and stream.read(10) == b"abc"
    with pytest.raises(FollowStopped):
        stream.read(10)
    stream.close()


# ------------------------------------------------------------------------- the command

def sapwood(*args: str) -> list[str]:
    return [sys.executable, "-m", "stream.cli", "learn", *args]


def test_sigterm_checkpoints_exits_0_and_the_same_command_goes_on(tmp_path):
    feed = tmp_path / "feed.csv"
    rows = [f"{i},{(i * 7919) % 100 / 10},{'yes' if (i * 7919) % 100 > 40 else 'no'}\n"
            for i in range(6000)]
    feed.write_text("n,x,alarm\n" + "".join(rows[:3000]))
    out = tmp_path / "out"
    out.mkdir()
    args = [str(feed), "--target", "alarm", "--follow", "--poll-seconds", "0.05",
            "--checkpoint", str(out / "c.ckpt"), "--predictions", str(out / "p.jsonl"),
            "--summary", str(out / "s.json"), "--kind", "n=ignore", "-q"]
    proc = subprocess.Popen(sapwood(*args), stderr=subprocess.PIPE, env=same_code_env())
    deadline = time.monotonic() + 120
    while not (out / "p.jsonl").exists() or \
            len((out / "p.jsonl").read_text().splitlines()) < 3000:
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.05)
    with open(feed, "a") as more:
        more.write("".join(rows[3000:4000]))
    time.sleep(0.5)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err.decode()
    summary = json.loads((out / "s.json").read_text())
    assert summary["stopped"] == "SIGTERM"
    assert summary["checkpoint"]["written"] >= 1 and (out / "c.ckpt").exists()
    with open(feed, "a") as more:
        more.write("".join(rows[4000:]))
    done = subprocess.run(sapwood(*args, "--idle-exit", "1"), capture_output=True,
                          env=same_code_env())
    assert done.returncode == 0, done.stderr.decode()
    summary = json.loads((out / "s.json").read_text())
    assert summary["stopped"] == "idle" and summary["records"] == 6000
    assert summary["checkpoint"]["resumes"] == 1
    # the same predictions as one plain run over the whole file: nothing lost or twice
    plain = tmp_path / "plain"
    plain.mkdir()
    subprocess.run(sapwood(str(feed), "--target", "alarm", "--kind", "n=ignore",
                           "--predictions", str(plain / "p.jsonl"), "-q"), check=True,
                   env=same_code_env())
    assert (out / "p.jsonl").read_text() == (plain / "p.jsonl").read_text()
