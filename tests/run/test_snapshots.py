"""Snapshot directory: numbering, index, retention, recovery, and what a reader may see.

Outside references: written_at is ISO 8601 in UTC; 1 700 000 000 s after the Unix epoch is
2023-11-14T22:13:20Z (from memory, checked with GNU `date -u -d @1700000000`). Snapshot
files must be strict JSON (RFC 8259: no NaN/Infinity), so a third party can parse them.
Atomic replacement relies on POSIX rename() (see tests/run/test_atomic.py).
"""

from __future__ import annotations

import json
import os
import pathlib
import re

import pytest

from stream.errors import ConfigError, ModelFileError
import stream.run.atomic as atomic
import stream.run.snapshots as snapshots
from stream.run.snapshots import SnapshotStore

T0 = 1_700_000_000.0  # 2023-11-14T22:13:20Z


def _payload(i: int) -> dict:
    return {
        "headline": {"accuracy": 0.5 + i / 100, "rules": i + 1},
        "rules": [{"conditions": [["supply_temp", "<=", 41.5 + i]], "predict": "alarm"}],
    }


def _strict_json(path) -> dict:
    def refuse(constant):
        raise AssertionError(f"{path} holds {constant}, which is not JSON")
    return json.loads(pathlib.Path(path).read_text(encoding="utf-8"), parse_constant=refuse)


def _fill(store: SnapshotStore, count: int, start: int = 0) -> list[dict]:
    return [store.write(1000 * (i + 1), _payload(i), f"rules at {i}\n", when=T0 + 60 * i)
            for i in range(start, start + count)]


def test_first_snapshot_files_and_index(tmp_path):
    store = SnapshotStore(tmp_path / "snaps")
    entry = store.write(5000, _payload(0), "IF supply_temp <= 41.5 THEN alarm\n", when=T0)
    assert entry == {"sequence": 1, "records": 5000, "written_at": "2023-11-14T22:13:20.000Z",
                     "json": "snapshot-000001.json", "text": "snapshot-000001.txt",
                     "headline": {"accuracy": 0.5, "rules": 1}}
    directory = tmp_path / "snaps"
    assert sorted(os.listdir(directory)) == ["index.json", "snapshot-000001.json",
                                            "snapshot-000001.txt"]
    document = _strict_json(directory / "snapshot-000001.json")
    assert list(document)[:3] == ["sequence", "records", "written_at"]
    assert document == {"sequence": 1, "records": 5000, "written_at": "2023-11-14T22:13:20.000Z",
                        **_payload(0)}
    assert (directory / "snapshot-000001.txt").read_bytes() == b"IF supply_temp <= 41.5 THEN alarm\n"
    index = _strict_json(directory / "index.json")
    assert index == {"format": "sapwood-snapshot-index", "version": 1, "snapshots": [entry]}
    assert store.entries() == [entry]
    assert store.load(1) == document
    assert store.load_text(1) == "IF supply_temp <= 41.5 THEN alarm\n"


def test_written_at_keeps_milliseconds_and_epoch(tmp_path):
    store = SnapshotStore(tmp_path)
    assert store.write(0, {}, "", when=0)["written_at"] == "1970-01-01T00:00:00.000Z"
    assert store.write(1, {}, "", when=T0 + 0.25)["written_at"] == "2023-11-14T22:13:20.250Z"


def test_entry_without_headline_has_no_headline_key(tmp_path):
    entry = SnapshotStore(tmp_path).write(10, {"rules": []}, "none\n", when=T0)
    assert "headline" not in entry


def test_the_clock_is_never_read(tmp_path, monkeypatch):
    import time

    def no_clock():
        raise AssertionError("the store read the clock")

    monkeypatch.setattr(time, "time", no_clock)
    monkeypatch.setattr(time, "time_ns", no_clock)
    _fill(SnapshotStore(tmp_path), 2)


def test_numbering_continues_across_store_instances(tmp_path):
    _fill(SnapshotStore(tmp_path), 3)
    entry = SnapshotStore(tmp_path).write(9999, {}, "x\n", when=T0 + 999)
    assert entry["sequence"] == 4
    assert [e["sequence"] for e in SnapshotStore(tmp_path).entries()] == [1, 2, 3, 4]


def test_latest_returns_newest_oldest_first(tmp_path):
    store = SnapshotStore(tmp_path)
    assert store.latest() == []
    _fill(store, 4)
    assert [s["sequence"] for s in store.latest()] == [4]
    assert [s["sequence"] for s in store.latest(2)] == [3, 4]
    assert [s["records"] for s in store.latest(10)] == [1000, 2000, 3000, 4000]


def test_retention_keeps_newest_and_leaves_other_files_alone(tmp_path):
    (tmp_path / "notes.md").write_text("operator notes\n")
    (tmp_path / "snapshot-old.json").write_text("{}")
    (tmp_path / "snapshot-0000001.json").write_text("not ours")  # non-canonical name
    store = SnapshotStore(tmp_path, keep=2)
    _fill(store, 5)
    assert [e["sequence"] for e in store.entries()] == [4, 5]
    assert sorted(os.listdir(tmp_path)) == sorted([
        "index.json", "notes.md", "snapshot-000004.json", "snapshot-000004.txt",
        "snapshot-000005.json", "snapshot-000005.txt", "snapshot-0000001.json",
        "snapshot-old.json"])
    with pytest.raises(ModelFileError, match="snapshot 1 is not in .* removed by retention"):
        store.load(1)
    # Numbering goes on after the retained ones, also for a store without retention.
    assert SnapshotStore(tmp_path).write(1, {}, "", when=T0)["sequence"] == 6


def test_retention_removes_index_entries_before_files(tmp_path, monkeypatch):
    store = SnapshotStore(tmp_path, keep=1)
    _fill(store, 1)
    deleted = []
    real_unlink = pathlib.Path.unlink

    def unlink(path, missing_ok=False):
        listed = {e["json"] for e in SnapshotStore(tmp_path).entries()} | {
            e["text"] for e in SnapshotStore(tmp_path).entries()}
        assert path.name not in listed, f"{path.name} deleted while the index names it"
        deleted.append(path.name)
        real_unlink(path, missing_ok=missing_ok)

    monkeypatch.setattr(pathlib.Path, "unlink", unlink)
    _fill(store, 2, start=1)
    assert deleted == ["snapshot-000001.json", "snapshot-000001.txt",
                       "snapshot-000002.json", "snapshot-000002.txt"]


def test_concurrent_reader_only_ever_sees_complete_snapshots(tmp_path, monkeypatch):
    # Simulated reader: at every file replacement and deletion the writer makes, a fresh
    # store follows the index and opens every file it names.
    checks = []

    def reader_looks():
        if not (tmp_path / "index.json").exists():
            return
        reader = SnapshotStore(tmp_path)
        for entry in reader.entries():
            document = reader.load(entry["sequence"])
            assert document["records"] == entry["records"]
            assert reader.load_text(entry["sequence"]).startswith("rules at ")
        checks.append(len(reader.entries()))

    real_replace, real_unlink = os.replace, pathlib.Path.unlink

    def replace(src, dst):
        reader_looks()
        real_replace(src, dst)
        reader_looks()

    def unlink(path, missing_ok=False):
        reader_looks()
        real_unlink(path, missing_ok=missing_ok)
        reader_looks()

    monkeypatch.setattr(atomic.os, "replace", replace)
    monkeypatch.setattr(pathlib.Path, "unlink", unlink)
    _fill(SnapshotStore(tmp_path, keep=2), 6)
    assert len(checks) > 40 and max(checks) == 2


def test_no_temp_files_after_success_or_failure(tmp_path, monkeypatch):
    store = SnapshotStore(tmp_path)
    _fill(store, 2)

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(atomic.os, "fsync", full_disk)
    with pytest.raises(OSError):
        store.write(1, {}, "x", when=T0)
    monkeypatch.undo()
    assert sorted(os.listdir(tmp_path)) == ["index.json", "snapshot-000001.json",
                                           "snapshot-000001.txt", "snapshot-000002.json",
                                           "snapshot-000002.txt"]
    assert [e["sequence"] for e in store.entries()] == [1, 2]


def test_crash_before_index_update_is_recovered(tmp_path, monkeypatch):
    store = SnapshotStore(tmp_path)
    _fill(store, 1)
    real_write = snapshots.write_atomic

    def crash_on_index(path, data):
        if pathlib.Path(path).name == "index.json":
            raise KeyboardInterrupt  # the process dies between snapshot and index
        real_write(path, data)

    monkeypatch.setattr(snapshots, "write_atomic", crash_on_index)
    with pytest.raises(KeyboardInterrupt):
        _fill(store, 1, start=1)
    monkeypatch.undo()
    # Readers following the index still see a consistent store.
    assert [e["sequence"] for e in store.entries()] == [1]
    # The next writer (a restarted process) adopts the orphan and numbers after it.
    entry = SnapshotStore(tmp_path).write(3000, _payload(2), "rules at 2\n", when=T0 + 120)
    assert entry["sequence"] == 3
    assert [(e["sequence"], e["records"]) for e in store.entries()] == [
        (1, 1000), (2, 2000), (3, 3000)]
    assert store.entries()[1]["headline"] == _payload(1)["headline"]


def test_missing_index_is_rebuilt_from_files(tmp_path):
    store = SnapshotStore(tmp_path, keep=3)
    _fill(store, 4)
    before = store.entries()
    (tmp_path / "index.json").unlink()
    assert store.entries() == before
    assert not (tmp_path / "index.json").exists()  # reading does not write
    assert store.rebuild_index() == before
    assert _strict_json(tmp_path / "index.json")["snapshots"] == before
    (tmp_path / "index.json").unlink()
    assert store.write(1, {}, "", when=T0)["sequence"] == 5
    assert [e["sequence"] for e in store.entries()] == [3, 4, 5]


def test_rebuild_marks_a_missing_text_file(tmp_path):
    store = SnapshotStore(tmp_path)
    _fill(store, 2)
    (tmp_path / "snapshot-000002.txt").unlink()
    assert [e["text"] for e in store.rebuild_index()] == ["snapshot-000001.txt", None]
    with pytest.raises(ModelFileError, match="snapshot 2 is not in"):
        store.load_text(2)


@pytest.mark.parametrize("content, message", [
    ('{"format": "sapwood-snapshot-index", "version": 1, "snapsh', "is corrupt: not valid JSON"),
    ("[1, 2, 3]", "is not a sapwood snapshot index"),
    ('{"format": "sapwood-snapshot-index", "version": 1, "snapshots": [{"sequence": "1"}]}',
     "is corrupt: malformed entries"),
    ('{"format": "sapwood-snapshot-index", "version": 4, "snapshots": []}',
     r"is in index version 4, newer than this sapwood reads \(up to 1\)"),
])
def test_corrupt_index_is_named(tmp_path, content, message):
    store = SnapshotStore(tmp_path)
    _fill(store, 1)
    (tmp_path / "index.json").write_text(content)
    index = str(tmp_path / "index.json")
    for action in (store.entries, lambda: store.write(1, {}, "", when=T0), store.latest):
        with pytest.raises(ModelFileError) as caught:
            action()
        assert str(caught.value).startswith(f"{index!r} ")
        assert re.search(message, str(caught.value))
    assert sorted(os.listdir(tmp_path)) == ["index.json", "snapshot-000001.json",
                                           "snapshot-000001.txt"]


def test_corrupt_snapshot_file_is_named(tmp_path):
    store = SnapshotStore(tmp_path)
    _fill(store, 2)
    (tmp_path / "snapshot-000002.json").write_text('{"sequence": 2, "rec')
    with pytest.raises(ModelFileError, match=r"snapshot-000002\.json' is corrupt: not valid JSON"):
        store.load(2)
    (tmp_path / "snapshot-000002.json").write_text('{"sequence": 7, "records": 1}')
    with pytest.raises(ModelFileError, match="is corrupt: it does not hold snapshot 2"):
        store.load(2)
    (tmp_path / "index.json").unlink()
    with pytest.raises(ModelFileError, match=r"snapshot-000002\.json' is corrupt"):
        store.entries()


def test_reading_a_missing_directory(tmp_path):
    store = SnapshotStore(tmp_path / "absent")
    with pytest.raises(ModelFileError, match="snapshot directory '.*absent' does not exist"):
        store.entries()
    store.write(1, {}, "", when=T0)  # writing creates it
    assert [e["sequence"] for e in store.entries()] == [1]


@pytest.mark.parametrize("call, message", [
    (lambda s: SnapshotStore(s, keep=0),
     "snapshot retention (keep) must be a whole number >= 1, got 0"),
    (lambda s: SnapshotStore(s).write(-1, {}, "", when=T0),
     "snapshot record count must be a whole number >= 0, got -1"),
    (lambda s: SnapshotStore(s).write(1, {}, "", when=float("nan")),
     "snapshot time must be a finite number of seconds since 1970-01-01 UTC, got nan"),
    (lambda s: SnapshotStore(s).write(1, {"sequence": 9}, "", when=T0),
     "snapshot payload must not carry 'sequence' (the store sets it), got 9"),
    (lambda s: SnapshotStore(s).write(1, {"headline": [1]}, "", when=T0),
     "snapshot headline must be a dict, got [1]"),
    (lambda s: SnapshotStore(s).write(1, {"headline": {"kappa": float("nan")}}, "", when=T0),
     "snapshot payload['headline']['kappa'] is nan; JSON has no NaN or infinity (use None)"),
    (lambda s: SnapshotStore(s).write(1, {}, b"bytes", when=T0),
     "snapshot text must be a str, got bytes"),
    (lambda s: SnapshotStore(s).load(0),
     "snapshot sequence must be a whole number >= 1, got 0"),
])
def test_bad_arguments_are_refused_and_nothing_is_written(tmp_path, call, message):
    with pytest.raises(ConfigError) as caught:
        call(tmp_path)
    assert str(caught.value) == message
    assert os.listdir(tmp_path) == []
