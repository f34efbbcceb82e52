"""Shared by the checkpoint tests: keep a copy of every checkpoint a run writes."""

from __future__ import annotations

import shutil
from pathlib import Path

from stream.run import checkpoint as ck
import stream.run.resume as resume


def keep_every_checkpoint(monkeypatch, folder: Path) -> list[str]:
    """Make the engine copy each checkpoint it writes into ``folder`` (``ckpt-000``,
    ``ckpt-001``...); returns the list the copies' paths are appended to."""
    copies: list[str] = []
    real = ck.write_checkpoint

    def keep_each(path, meta, arrays, guard=None):
        size = real(path, meta, arrays, guard)
        copies.append(shutil.copy(path, folder / f"ckpt-{len(copies):03d}"))
        return size

    monkeypatch.setattr(resume, "write_checkpoint", keep_each)
    return copies
