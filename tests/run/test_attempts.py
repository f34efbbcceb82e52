"""A run killed before its first checkpoint: its rerun does not number snapshots on after
the dead attempt's, and temporary files of interrupted writes are removed.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami 1993), as in the kill tests.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

from stream.child_env import same_code_env
from stream.run.attempts import MARKER, begin_attempt, note_checkpointed
from tests.run.test_resume_kill import write_agrawal


def learn_command(source: Path, out: Path) -> list[str]:
    # no checkpoint before the end: a kill lands before the first one
    return [sys.executable, "-m", "stream.cli", "learn", str(source), "--target", "class",
            "--checkpoint", str(out / "run.ckpt"), "--checkpoint-every", "0",
            "--checkpoint-seconds", "0", "--snapshots", str(out / "snapshots"),
            "--snapshot-every", "1000", "--batch-rows", "250", "-q",
            "--quarantine", str(out / "q.jsonl"), "--kind", "salary=numeric"]


def test_a_rerun_after_a_kill_before_the_first_checkpoint_numbers_snapshots_once(tmp_path):
    source = tmp_path / "agrawal.csv"
    write_agrawal(source, 40_000)
    cmd = learn_command(source, tmp_path)
    snapshots = tmp_path / "snapshots"
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=same_code_env())
    while proc.poll() is None and len(list(snapshots.glob("snapshot-*.json"))) < 3:
        time.sleep(0.002)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert proc.returncode == -signal.SIGKILL, "the run ended before it could be killed"
    assert not (tmp_path / "run.ckpt").exists()
    (snapshots / ".snapshot-000099.json.x1y2.tmp").write_text("{")   # an interrupted write
    done = subprocess.run(cmd, capture_output=True, env=same_code_env())
    assert done.returncode == 0, done.stderr.decode()
    index = json.loads((snapshots / "index.json").read_text())
    records = [entry["records"] for entry in index["snapshots"]] \
        if isinstance(index, dict) else [entry["records"] for entry in index]
    assert records == sorted(set(records)) and records[0] == 1000
    assert len(records) == 40
    assert not list(snapshots.glob(".*.tmp"))


def test_snapshots_of_an_attempt_that_checkpointed_are_kept(tmp_path):
    folder = tmp_path / "snaps"
    folder.mkdir()
    begin_attempt(str(folder), str(tmp_path / "a.ckpt"), fresh=True)
    (folder / "snapshot-000001.json").write_text("{}")
    note_checkpointed(str(folder))
    # the checkpoint was removed to start over: what was written stays
    assert begin_attempt(str(folder), str(tmp_path / "a.ckpt"), fresh=True) == 0
    assert (folder / "snapshot-000001.json").exists()
    # another run's marker, or a damaged one, removes nothing
    (folder / "snapshot-000002.json").write_text("{}")
    (folder / MARKER).write_text('{"checkpoint": 3}')
    assert begin_attempt(str(folder), str(tmp_path / "a.ckpt"), fresh=True) == 0
    assert begin_attempt(str(folder), str(tmp_path / "b.ckpt"), fresh=True) == 0
    assert len(list(folder.glob("snapshot-*.json"))) == 2
