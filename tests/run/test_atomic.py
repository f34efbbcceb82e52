"""Atomic replacement: the target holds the old content or the new, never a mixture.

Standards relied on: POSIX.1 rename() ("a link named new shall remain visible to other
processes throughout the renaming operation and refer either to the file referred to by new
or old"), which the Python docs of os.replace restate; fsync of the directory after a
rename is common practice (Linux fsync(2) manual, from memory).
"""

from __future__ import annotations

import os
import stat
import sys

import pytest

from stream.errors import ConfigError
import stream.run.atomic as atomic
from stream.run.atomic import atomic_writer, write_atomic


def _names(directory) -> list[str]:
    return sorted(os.listdir(directory))


def test_bytes_and_text_round_trip_without_leftovers(tmp_path):
    write_atomic(tmp_path / "a.bin", b"\x00\xffdata")
    write_atomic(tmp_path / "b.txt", "Druck \u2264 3,2 bar\n")
    assert (tmp_path / "a.bin").read_bytes() == b"\x00\xffdata"
    assert (tmp_path / "b.txt").read_bytes() == "Druck \u2264 3,2 bar\n".encode("utf-8")
    assert _names(tmp_path) == ["a.bin", "b.txt"]


def test_replaces_existing_file(tmp_path):
    target = tmp_path / "state"
    write_atomic(target, b"old")
    write_atomic(str(target), b"new")  # str paths as well as Path
    assert target.read_bytes() == b"new"
    assert _names(tmp_path) == ["state"]


def test_text_mode_writes_newlines_as_given(tmp_path):
    target = tmp_path / "rules.txt"
    with atomic_writer(target, "w") as out:
        out.write("a\nb\r\nc")
    assert target.read_bytes() == b"a\nb\r\nc"


def test_reader_during_write_sees_the_old_file(tmp_path):
    # Simulates a concurrent reader: it opens the target while the writer is half done.
    target = tmp_path / "index.json"
    write_atomic(target, b'{"complete": "old"}')
    with atomic_writer(target) as out:
        out.write(b'{"complete": ')
        out.flush()
        assert target.read_bytes() == b'{"complete": "old"}'
        out.write(b'"new"}')
        assert target.read_bytes() == b'{"complete": "old"}'
    assert target.read_bytes() == b'{"complete": "new"}'


def test_new_target_does_not_exist_until_complete(tmp_path):
    target = tmp_path / "fresh"
    with atomic_writer(target) as out:
        out.write(b"partial")
        out.flush()
        assert not target.exists()
    assert target.read_bytes() == b"partial"


def test_exception_in_block_keeps_old_file_and_removes_temp(tmp_path):
    target = tmp_path / "model.sap"
    write_atomic(target, b"old state")
    with pytest.raises(RuntimeError, match="boom"):
        with atomic_writer(target) as out:
            out.write(b"half of the new st")
            raise RuntimeError("boom")
    assert target.read_bytes() == b"old state"
    assert _names(tmp_path) == ["model.sap"]


def test_interrupt_in_block_also_cleans_up(tmp_path):
    target = tmp_path / "model.sap"
    with pytest.raises(KeyboardInterrupt):
        with atomic_writer(target) as out:
            out.write(b"x")
            raise KeyboardInterrupt
    assert _names(tmp_path) == []


@pytest.mark.parametrize("failing", ["fsync", "replace"])
def test_failing_system_call_keeps_old_file(tmp_path, monkeypatch, failing):
    target = tmp_path / "model.sap"
    write_atomic(target, b"old state")

    def fail(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(atomic.os, failing, fail)
    with pytest.raises(OSError, match="No space left"):
        write_atomic(target, b"new state")
    monkeypatch.undo()
    assert target.read_bytes() == b"old state"
    assert _names(tmp_path) == ["model.sap"]


def test_order_fsync_file_then_replace_then_fsync_directory(tmp_path, monkeypatch):
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        kind = "directory" if stat.S_ISDIR(os.fstat(fd).st_mode) else "file"
        events.append(f"fsync {kind}")
        real_fsync(fd)

    def replace(src, dst):
        events.append("replace")
        real_replace(src, dst)

    monkeypatch.setattr(atomic.os, "fsync", fsync)
    monkeypatch.setattr(atomic.os, "replace", replace)
    write_atomic(tmp_path / "x", b"1")
    expected = ["fsync file", "replace", "fsync directory"]
    if sys.platform == "win32":  # no directory handles there
        expected = expected[:2]
    assert events == expected


def test_bad_mode_is_refused_before_touching_disk(tmp_path):
    with pytest.raises(ConfigError, match="atomic writer mode must be one of 'wb', 'w', got 'a'"):
        with atomic_writer(tmp_path / "x", "a"):
            pass
    assert _names(tmp_path) == []


def test_missing_directory_raises_oserror(tmp_path):
    with pytest.raises(FileNotFoundError):
        write_atomic(tmp_path / "nowhere" / "x", b"1")
    assert _names(tmp_path) == []


@pytest.mark.skipif(not hasattr(os, "fchmod"), reason="POSIX permissions only")
def test_permissions_new_file_follows_umask_existing_file_kept(tmp_path):
    old_mask = os.umask(0o027)
    try:
        write_atomic(tmp_path / "new", b"1")
        assert stat.S_IMODE(os.stat(tmp_path / "new").st_mode) == 0o640
        existing = tmp_path / "existing"
        existing.write_bytes(b"0")
        os.chmod(existing, 0o604)
        write_atomic(existing, b"1")
        assert stat.S_IMODE(os.stat(existing).st_mode) == 0o604
    finally:
        os.umask(old_mask)


def test_a_fencing_check_that_refuses_leaves_the_old_file(tmp_path):
    """before_replace runs after the new content is on disk and before the rename; when
    it raises, the target keeps its old content and no temporary file is left."""
    target = tmp_path / "state.json"
    write_atomic(target, b"old")

    def superseded():
        raise RuntimeError("a later learner has started")

    with pytest.raises(RuntimeError, match="later learner"):
        write_atomic(target, b"new", before_replace=superseded)
    assert target.read_bytes() == b"old" and _names(tmp_path) == ["state.json"]
    calls = []
    write_atomic(target, b"new", before_replace=lambda: calls.append(target.read_bytes()))
    assert calls == [b"old"] and target.read_bytes() == b"new"


def test_a_checkpoint_whose_guard_refuses_changes_no_file(tmp_path):
    """write_checkpoint checks before setting the old checkpoint aside and again before
    the rename: a refusal at either point leaves the checkpoint and its .prev as they
    were."""
    import numpy as np

    from stream.run.checkpoint import write_checkpoint

    path = tmp_path / "run.ckpt"
    write_checkpoint(path, {"n": 1}, {"a": np.arange(3)})
    write_checkpoint(path, {"n": 2}, {"a": np.arange(4)})
    before = {name: (tmp_path / name).read_bytes() for name in _names(tmp_path)}
    for refuse_at in (1, 2):
        calls = []

        def guard():
            calls.append(1)
            if len(calls) == refuse_at:
                raise RuntimeError("superseded")

        with pytest.raises(RuntimeError):
            write_checkpoint(path, {"n": 3}, {"a": np.arange(5)}, guard)
        assert {name: (tmp_path / name).read_bytes() for name in _names(tmp_path)} == before
