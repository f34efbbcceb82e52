"""The live view: reading a run while it writes, the frame, the refresh loop, `watch`.

Outside references: the frame shows the metrics log of a real run on river's Agrawal
generator (tests/operator_runs.py); the control sequences are ECMA-48 (CSI H cursor
home, CSI K erase in line, CSI J erase in display) and the DEC private mode 25 (cursor
shown/hidden) that terminals follow (from memory; common practice).
"""

from __future__ import annotations

import io
import json
import os
import threading

import pytest
from click.testing import CliRunner
from tests.operator_runs import shared_run

from stream.cli.views import watch as watch_command
from stream.errors import ModelFileError
from stream.run.snapshots import SnapshotStore
from stream.views.live_view import ASCII_BLOCKS, WatchState, render_frame, sparkline, watch
from stream.views.run_logs import LogTail, read_metrics

EVENTS = [
    {"record": 9000, "time": "2025-01-01T00:00:00Z", "kind": "alarm", "node": 3,
     "path": [{"feature": "age", "op": ">", "value": 40.9}]},
    {"record": 9500, "time": "2025-01-01T00:01:00Z", "kind": "start", "node": 3,
     "path": [{"feature": "age", "op": ">", "value": 40.9}]},
    {"record": 12000, "time": "2025-01-01T00:05:00Z", "kind": "swap", "node": 0, "path": []},
]


@pytest.fixture(scope="module")
def run():
    return shared_run("majority")


def _events_file(directory) -> str:
    path = os.path.join(directory, "events.jsonl")
    with open(path, "w", encoding="utf-8") as handle:
        handle.writelines(json.dumps(e) + "\n" for e in EVENTS)
    return path


def test_sparkline():
    assert sparkline(range(8), 8) == "▁▂▃▄▅▆▇█"
    assert sparkline([1, None, 3], 3) == "▁ █"
    assert sparkline([5, 5, 5], 3) == "▄▄▄"
    assert sparkline(list(range(20)), 4) == "▁▃▆█"  # the last four
    assert sparkline([0, 1], 2, ASCII_BLOCKS) == "_@"
    assert sparkline([], 5) == ""


def test_log_tail_reads_whole_lines_only(tmp_path):
    path = tmp_path / "log.jsonl"
    tail = LogTail(path)
    assert tail.read() == []  # not there yet
    path.write_bytes(b'{"records": 1}\n{"rec')
    assert tail.read() == [{"records": 1}]
    assert tail.read() == []
    with open(path, "ab") as handle:
        handle.write(b'ords": 2}\n')
    assert tail.read() == [{"records": 2}]
    path.write_bytes(b'{"records": 7}\n')  # a new run replaced the file
    assert tail.read() == [{"records": 7}] and tail.restarted
    with open(path, "ab") as handle:
        handle.write(b"[1]\n")
    with pytest.raises(ModelFileError, match=r"log.jsonl line 2: list found where a JSON "
                                             r"object was expected"):
        tail.read()


def test_frame_shows_the_latest_metrics_events_and_rules(run, tmp_path):
    state = WatchState(str(run.snapshots), str(run.metrics), _events_file(tmp_path))
    assert state.refresh()
    rows = read_metrics(run.metrics)
    last = rows[-1]
    frame = render_frame(state, width=120, height=30, now="2025-01-01T00:10:00Z")
    assert len(frame) <= 30 and all(len(line) <= 120 for line in frame)
    assert frame[0] == "sapwood watch | target approved | 2025-01-01T00:10:00Z"
    assert frame[1].startswith(f"{last['records']:,} records | snapshot ")
    accuracy = next(line for line in frame if line.startswith("accuracy"))
    assert f"{100 * last['accuracy']:5.1f}%" in accuracy
    assert f"last window {100 * last['window_accuracy']:5.1f}%" in accuracy
    events = [line for line in frame if line.startswith("  record ")]
    assert [int(line.split()[1].replace(",", "")) for line in events] == [12000, 9500, 9000]
    assert "age > 40.9" in events[1] and events[0].endswith("root")
    listed = [line.split()[0] for line in frame if line.startswith("  R")]
    document = state.snapshot
    concern = document["concern"]
    assert concern in document["classes"]  # the run chose one (the rarer class)
    total = sum(r["class_counts"].get(concern, 0) for r in document["rules"])
    leading = sorted((r for r in document["rules"] if r["predict"] == concern),
                     key=lambda r: -r["class_counts"][concern] / total)
    rest = sorted((r for r in document["rules"] if r["predict"] != concern),
                  key=lambda r: (-r["coverage"], r["id"]))
    assert listed and listed == [r["id"] for r in leading + rest][:len(listed)]
    assert f"rules, class of concern {concern} first" in "\n".join(frame)
    assert frame[-1].startswith("Learned rules describe what the data showed so far")
    assert not state.refresh()  # nothing new


def test_frame_before_anything_was_written(tmp_path):
    state = WatchState(str(tmp_path / "not-yet"), str(tmp_path / "m.jsonl"))
    state.refresh()
    frame = render_frame(state, width=300)
    assert frame[1] == f"no records yet | waiting for the first snapshot in {tmp_path / 'not-yet'}"
    assert "no metrics yet" in frame


def test_plain_output_prints_only_when_something_changed(run, tmp_path):
    metrics = tmp_path / "metrics.jsonl"
    lines = run.metrics.read_text().splitlines(keepends=True)
    metrics.write_text("".join(lines[:5]))
    out = io.StringIO()
    pauses = []

    def sleep(seconds):
        pauses.append(seconds)
        if len(pauses) == 2:  # the run writes more between the 2nd and 3rd refresh
            with open(metrics, "a") as handle:
                handle.write("".join(lines[5:10]))

    watch(WatchState(str(run.snapshots), str(metrics)), out, interval=0.25, iterations=4,
          tty=False, sleep=sleep, wall=lambda: 1.7e9)
    text = out.getvalue()
    assert "\x1b" not in text
    blocks = text.split("\n\n")[:-1]
    assert len(blocks) == 2 and pauses == [0.25, 0.25, 0.25]
    records = [json.loads(line)["records"] for line in lines[:10]]
    assert blocks[0].splitlines()[1].startswith(f"{records[4]:,} records")
    assert blocks[1].splitlines()[1].startswith(f"{records[9]:,} records")


def test_terminal_output_redraws_in_place(run):
    out = io.StringIO()
    watch(WatchState(str(run.snapshots), str(run.metrics)), out, iterations=2, tty=True,
          sleep=lambda s: None, wall=lambda: 1.7e9, size=lambda: os.terminal_size((90, 24)))
    text = out.getvalue()
    assert text.startswith("\x1b[?25l\x1b[2J\x1b[H")
    assert text.endswith("\x1b[K\x1b[J\x1b[?25h\n")
    assert text.count("\x1b[H") == 2
    first = text[len("\x1b[?25l\x1b[2J\x1b[H"):text.index("\x1b[J")]
    drawn = first.split("\x1b[K\n")
    assert len(drawn) <= 24 and all(len(line.replace("\x1b[K", "")) <= 90 for line in drawn)


def test_reading_while_a_run_writes(tmp_path):
    """A writer keeps adding snapshots (retention deleting old ones) and metrics rows in
    pieces; the watcher must never fail and must end on the newest snapshot."""
    directory = tmp_path / "snaps"
    metrics = tmp_path / "metrics.jsonl"
    store = SnapshotStore(directory, keep=2)
    done = threading.Event()

    def writer():
        for k in range(1, 121):
            store.write(100 * k, {"target": "t", "rules": [], "headline": {"rules": 0}},
                        "", when=1.7e9 + k)
            with open(metrics, "a") as handle:
                row = json.dumps({"records": 100 * k, "accuracy": 0.5})
                handle.write(row[:7])
                handle.flush()
                handle.write(row[7:] + "\n")
        done.set()

    state = WatchState(str(directory), str(metrics))
    thread = threading.Thread(target=writer)
    thread.start()
    seen = []
    while not done.is_set():
        state.refresh()
        if state.snapshot:
            seen.append(state.snapshot["sequence"])
        render_frame(state)
    thread.join()
    state.refresh()
    assert seen == sorted(seen)
    assert state.snapshot["sequence"] == 120 and state.rows[-1]["records"] == 12000


def test_watch_command_once(run, tmp_path):
    result = CliRunner().invoke(watch_command, [str(run.snapshots), "--metrics",
                                                str(run.metrics), "--events",
                                                _events_file(tmp_path), "--once"])
    assert result.exit_code == 0, result.output
    assert result.output.startswith("sapwood watch | target approved | ")
    assert "drift events: 3 so far, 1 of them confirmed (swaps); latest 3:" in result.output
    refused = CliRunner().invoke(watch_command, [str(run.snapshots), "--every", "0"])
    assert str(refused.exception) == "--every must be a number of seconds > 0, got 0"
