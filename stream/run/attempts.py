"""A checkpointed run's snapshot directory across attempts of the same run.

A run killed before its first checkpoint leaves the snapshots it wrote; the rerun of the
same command starts afresh (there is no checkpoint to resume) and would number its own
snapshots on after them: the index would read 10000, 20000, 10000, 20000... A marker
file in the snapshot directory says which checkpoint the snapshots since
``started_after`` belong to and whether that attempt ever wrote a checkpoint. A fresh
attempt of the same checkpoint whose predecessor never checkpointed removes those
snapshots first, as it empties its quarantine and logs; once a checkpoint is written,
the snapshots stay (a resume cuts back only what came after the checkpoint). Temporary
files of interrupted writes are removed at every start.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from .atomic import write_atomic
from .checkpoint import rollback_snapshots
from .snapshots import SnapshotStore

MARKER = ".sapwood-attempt"   # no .json: tools that list snapshot files skip it


def begin_attempt(directory: str, checkpoint_path: str, fresh: bool) -> int:
    """Tidy ``directory`` as a checkpointed run starts; returns how many snapshots of a
    previous attempt that never checkpointed were removed (``fresh`` runs only)."""
    folder = Path(directory)
    remove_stale_temporaries(folder)
    if not fresh:
        return 0
    owner = os.path.abspath(checkpoint_path)
    previous = _read_marker(folder)
    removed = 0
    if previous is not None and previous["checkpoint"] == owner \
            and not previous["checkpointed"]:
        removed = rollback_snapshots(directory, previous["started_after"])
    _write_marker(folder, {"checkpoint": owner, "started_after": _highest(folder),
                           "checkpointed": False})
    return removed


def note_checkpointed(directory: str) -> None:
    """The current attempt wrote a checkpoint: its snapshots are kept from now on."""
    folder = Path(directory)
    marker = _read_marker(folder)
    if marker is not None and not marker["checkpointed"]:
        _write_marker(folder, {**marker, "checkpointed": True})


def remove_stale_temporaries(folder: Path) -> int:
    """Remove the temporary files a killed write left (``.snapshot-*.tmp``,
    ``.index.json.*.tmp``, the marker's); returns how many."""
    if not folder.is_dir():
        return 0
    removed = 0
    for entry in folder.iterdir():
        name = entry.name
        if name.endswith(".tmp") and name.startswith((".snapshot-", ".index.json.",
                                                      f".{MARKER}.")):
            try:
                entry.unlink()
                removed += 1
            except FileNotFoundError:
                pass
    return removed


def _read_marker(folder: Path) -> dict | None:
    try:
        data = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not (isinstance(data, dict) and isinstance(data.get("checkpoint"), str)
            and isinstance(data.get("started_after"), int)
            and isinstance(data.get("checkpointed"), bool)):
        return None      # not ours or damaged: nothing is removed on its word
    return data


def _write_marker(folder: Path, data: dict) -> None:
    write_atomic(folder / MARKER, json.dumps(data) + "\n")


def _highest(folder: Path) -> int:
    return max(SnapshotStore(folder).sequences_on_disk(), default=0)
