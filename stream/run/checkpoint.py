"""Checkpoints: a learning run's whole state on disk, so a restarted run goes on exactly.

Inside: :func:`write_checkpoint` and :func:`read_checkpoint` (the file and its fallback),
:func:`task_state` / :func:`restore_task` (learner and metrics as arrays), the job
fingerprint that tells whether a checkpoint belongs to a command (:func:`job_fingerprint`,
:func:`check_fingerprint`), :class:`ResumableOutput` (an appended output file cut back to
its length at the checkpoint) and :func:`rollback_snapshots`.

The file is sapwood's state container (:mod:`stream.run.model_file`: versioned, every byte
checksummed, written to a temporary file, fsynced and renamed into place; never pickle)
of kind ``sapwood-checkpoint``. Its ``meta`` (JSON) holds::

    checkpoint_version   CHECKPOINT_VERSION
    written_at           ISO 8601 UTC (wall clock, for people)
    job                  the fingerprint of the command (sources, target, options...)
    schema, encoder      the schema and the encoder's code books
    task, tree, score    the learner's settings and meta, the metrics' scalars
    run                  counters: records, quarantined, snapshots, last data time,
                         drift events not yet in a snapshot, seconds, resumes...
    source               the position after the last fully learned batch
    labels_source        the same for the label source (delayed labels), or None
    labels               the delayed-label buffer's scalars, or None
    outputs              {name: {"path", "bytes"}} of every file the run appends to

and its arrays the tree tables (``tree.*``), the metrics' arrays (``score.*``) and the
delayed-label buffer (``labels.*``).

Keeping the previous one: before a new checkpoint replaces ``NAME``, ``NAME`` is renamed
to ``NAME.prev``. If ``NAME`` is damaged (truncated, a checksum fails) the run resumes from
``NAME.prev`` with a warning naming the damaged file, which is kept as ``NAME.corrupt``
and never becomes a ``.prev``. For files that is exact; a broker source acknowledged
what the newer checkpoint covered, so records between the two are not delivered again.

Limitations: predictions written to standard output cannot be cut back, so the lines
after the last checkpoint are written again after a crash (files are exact); snapshots
taken by time, and the clock times of drift events, follow the wall clock of whichever
run wrote them; a fresh checkpointed run empties an existing quarantine file, since an
attempt that died before its first checkpoint may have written to it.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

import numpy as np

from stream.errors import ConfigError, ModelFileError, NewerFileError

from .model_file import read_model_file, write_model_file
from .saved_model import LEARNERS
from .snapshots import SnapshotStore

CHECKPOINT_KIND = "sapwood-checkpoint"
CHECKPOINT_VERSION = 1
PREVIOUS_SUFFIX = ".prev"
CORRUPT_SUFFIX = ".corrupt"



@dataclasses.dataclass
class Checkpoint:
    """A checkpoint as read: ``meta`` (JSON), ``arrays``, and the file it came from."""

    meta: dict
    arrays: dict[str, np.ndarray]
    path: str

    def arrays_under(self, prefix: str) -> dict[str, np.ndarray]:
        """The arrays named ``prefix.*``, without the prefix."""
        cut = len(prefix) + 1
        return {k[cut:]: v for k, v in self.arrays.items() if k.startswith(prefix + ".")}


# ---------------------------------------------------------------------------------------
# the file
# ---------------------------------------------------------------------------------------

def write_checkpoint(path: str | os.PathLike, meta: dict, arrays: dict[str, np.ndarray],
                     guard: Callable[[], None] | None = None) -> int:
    """Write a checkpoint atomically, keeping the one it replaces as ``path.prev``.

    Returns the size of the new file in bytes. ``meta`` gets ``checkpoint_version``.
    ``guard`` (a fencing check) is called before the old file is set aside and again
    just before the new one takes its name; when it raises, no file changes.
    """
    path = os.fspath(path)
    meta = {"checkpoint_version": CHECKPOINT_VERSION, **meta}
    if guard is not None:
        guard()

    def set_old_aside() -> None:     # the new file is on disk; it takes the name next
        if guard is not None:
            guard()
        if os.path.exists(path):
            os.replace(path, path + PREVIOUS_SUFFIX)

    write_model_file(path, CHECKPOINT_KIND, meta, arrays, set_old_aside)
    return os.path.getsize(path)


def read_checkpoint(path: str | os.PathLike, warn: Callable[[str], None]) -> Checkpoint | None:
    """The newest usable checkpoint at ``path`` (or ``path.prev``), None if there is none.

    Raises
    ------
    ModelFileError
        Neither file is usable; the message names both and what is wrong.
    """
    path = os.fspath(path)
    previous = path + PREVIOUS_SUFFIX
    have_main, have_prev = os.path.exists(path), os.path.exists(previous)
    if not have_main and not have_prev:
        return None
    problem = None
    if have_main:
        try:
            return _read(path)
        except NewerFileError:
            raise                 # not damaged: never set aside, never skipped
        except ModelFileError as exc:
            problem = exc
    if not have_prev:
        raise ModelFileError(f"checkpoint {problem}; there is no previous checkpoint "
                             f"{previous!r} to fall back to: remove {path!r} to start "
                             f"over") from problem
    try:
        found = _read(previous)
    except ModelFileError as exc:
        first = f"checkpoint {problem}; " if problem else ""
        raise ModelFileError(f"{first}previous checkpoint {exc}; remove both to start "
                             f"over") from exc
    if problem is not None:
        os.replace(path, path + CORRUPT_SUFFIX)
        warn(f"checkpoint {problem}; resuming from the previous checkpoint {previous!r} "
             f"(the damaged file is kept as {path + CORRUPT_SUFFIX!r})")
    return found


def _read(path: str) -> Checkpoint:
    meta, arrays = read_model_file(path, expect_kind=CHECKPOINT_KIND)
    version = meta.get("checkpoint_version")
    if type(version) is not int or version < 1:
        raise ModelFileError(f"{path!r} is corrupt: it has no checkpoint version")
    if version > CHECKPOINT_VERSION:
        raise NewerFileError(f"{path!r} was written by a newer sapwood (checkpoint "
                             f"version {version}; this one reads up to "
                             f"{CHECKPOINT_VERSION}): resume with that sapwood")
    for key in ("job", "schema", "encoder", "task", "tree", "score", "run", "outputs"):
        if key not in meta:
            raise ModelFileError(f"{path!r} is corrupt: the checkpoint lacks {key!r}")
    return Checkpoint(meta, arrays, path)


# ---------------------------------------------------------------------------------------
# learner and metrics
# ---------------------------------------------------------------------------------------

def task_state(task) -> tuple[dict, dict[str, np.ndarray]]:
    """(meta, arrays) of a task's learner and metrics; arrays are named tree.* and score.*."""
    tree_meta, tables = task.model.state()
    arrays = {f"tree.{k}": np.array(v) for k, v in tables.items()}
    score_meta = {}
    for key, value in task.score.state_dict().items():
        if isinstance(value, np.ndarray):
            arrays[f"score.{key}"] = value
        else:
            score_meta[key] = value
    return {"task": task.name, "tree": tree_meta, "score": score_meta}, arrays


def restore_task(checkpoint: Checkpoint):
    """The task (learner and metrics) a checkpoint holds."""
    meta = checkpoint.meta
    try:
        learner, scorer, task = LEARNERS[meta["task"]]
        model = learner.from_state(meta["tree"], checkpoint.arrays_under("tree"))
        score = scorer.from_state({**meta["score"], **checkpoint.arrays_under("score")})
    except (KeyError, TypeError, ValueError, ConfigError) as exc:
        raise ModelFileError(f"{checkpoint.path!r} holds no usable learner: {exc}") from exc
    return task(model, score)


def json_ready(value: Any) -> Any:
    """``value`` as exact JSON values: tuples as lists, numpy scalars as Python ones,
    NaN and infinity as None."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


# ---------------------------------------------------------------------------------------
# does a checkpoint belong to this command?
# ---------------------------------------------------------------------------------------

_FINGERPRINT_NAMES = {
    "sources": "the sources", "target": "--target", "task": "--task", "fmt": "--format",
    "schema": "--schema", "declared": "--kind", "options": "the tree options",
    "settings": "the learner settings", "window": "--window", "fading": "the fading factor",
    "metrics_every": "--metrics-every", "snapshot_dir": "--snapshots",
    "snapshot_every": "--snapshot-every", "metrics": "--metrics", "events": "--events",
    "predictions": "--predictions", "quarantine": "--quarantine", "labels": "--labels",
    "label_window": "--label-window", "label_seconds": "--label-seconds",
    "id_field": "--id-field", "header": "--header", "concern": "--concern",
    "alerts": "--alerts", "alert_every": "--alert-every", "alert_move": "--alert-move",
}


def _place(spec: str) -> str:
    """A source as compared: files by absolute path, URLs without their password."""
    if "://" in spec:
        from connectors.broker_payloads import redacted

        return redacted(spec)
    return spec if spec == "-" else os.path.abspath(spec)


def _path(value: str | None) -> str | None:
    return None if value is None or value == "-" else os.path.abspath(value)


def job_fingerprint(job) -> dict:
    """What must be the same for a checkpoint to be resumed by ``job`` (a LearnJob):
    everything that decides the results and the files the run appends to. Batch size,
    checkpoint intervals, follow mode and the summary/model paths may change."""
    settings = job.settings.to_dict() if job.settings is not None else None
    return json_ready({
        "sources": [_place(s) for s in job.sources], "target": job.target,
        "task": job.task, "fmt": job.fmt, "schema": _path(job.schema_path),
        "declared": dict(sorted(job.declared.items())),
        "options": dict(sorted((k, v) for k, v in job.options.items() if v is not None)),
        "settings": settings, "window": job.window, "fading": job.fading,
        "metrics_every": job.metrics_every, "snapshot_dir": _path(job.snapshot_dir),
        "snapshot_every": job.snapshot_every, "metrics": _path(job.metrics_path),
        "events": _path(job.events_path), "predictions": job.predictions_path and _place(job.predictions_path),
        "quarantine": _path(job.quarantine_path),
        "labels": [_place(s) for s in job.labels], "label_window": job.label_window,
        "label_seconds": job.label_seconds, "id_field": job.id_field,
        "header": job.header, "concern": job.concern, "alerts": job.alerts_path and
        _place(job.alerts_path), "alert_every": job.alerts_path and job.alert_every,
        "alert_move": job.alerts_path and job.alert_move, "by": job.by,
    })


def check_fingerprint(saved: dict, current: dict, path: str) -> None:
    """Refuse (ConfigError, exit 1) a checkpoint written by another command."""
    keys = list(_FINGERPRINT_NAMES) + sorted((set(saved) | set(current)) -
                                             set(_FINGERPRINT_NAMES))
    for key in keys:
        if saved.get(key) != current.get(key):
            raise ConfigError(
                f"checkpoint {path!r} belongs to another command ("
                f"{_FINGERPRINT_NAMES.get(key, key)}: {_shown(saved.get(key))} there, "
                f"{_shown(current.get(key))} now); give the same options to resume, or "
                f"remove the checkpoint to start over")


def _shown(value: Any) -> str:
    text = json.dumps(value)
    return text if len(text) <= 120 else text[:117] + "..."


# ---------------------------------------------------------------------------------------
# outputs the run appends to
# ---------------------------------------------------------------------------------------

class ResumableOutput:
    """A text file a run appends to, which a resumed run cuts back to its checkpoint.

    Parameters
    ----------
    path
        The file.
    resume_bytes
        None for a fresh run (the file is created empty); else the length recorded
        in the checkpoint: the file is truncated to it and appended to.
    what
        How messages name the file ("metrics log").
    """

    def __init__(self, path: str, resume_bytes: int | None, what: str) -> None:
        self.path = path
        if resume_bytes is None:
            self.handle = open(path, "w", encoding="utf-8")
            return
        try:
            size = os.path.getsize(path)
        except FileNotFoundError:
            size = -1
        if size < resume_bytes:
            raise ModelFileError(
                f"{what} {path!r} is {'missing' if size < 0 else f'{size} bytes long'} but "
                f"the checkpoint covers {resume_bytes} bytes of it: it was changed after "
                f"the checkpoint; remove the checkpoint to start over")
        with open(path, "r+b") as raw:
            raw.truncate(resume_bytes)
        self.handle = open(path, "a", encoding="utf-8")

    def durable_length(self) -> int:
        """Flush and fsync; the file's length, which a checkpoint may now record."""
        self.handle.flush()
        os.fsync(self.handle.fileno())
        return self.handle.tell()

    def close(self) -> None:
        self.handle.close()


def truncate_for_resume(path: str, resume_bytes: int | None, what: str) -> bool:
    """Cut a file a run appends to back to its checkpoint length (lazily created
    files: the quarantine). Returns True when the file holds earlier content."""
    if not resume_bytes:
        if resume_bytes == 0 and os.path.exists(path):
            os.truncate(path, 0)
        return False
    ResumableOutput(path, resume_bytes, what).close()
    return True


def fsync_length(path: str) -> int:
    """fsync a file written by someone else's handle (already flushed); its length."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
        return os.fstat(fd).st_size
    finally:
        os.close(fd)


def rollback_snapshots(directory: str, sequence: int) -> int:
    """Remove the snapshots numbered above ``sequence`` (written after the checkpoint)
    and rebuild the index; returns how many were removed."""
    folder = Path(directory)
    if not folder.is_dir():
        return 0
    removed = 0
    for entry in folder.iterdir():
        name = entry.name
        if name.startswith("snapshot-") and name.endswith((".json", ".txt")):
            digits = name[len("snapshot-"):].rsplit(".", 1)[0]
            if digits.isdigit() and int(digits) > sequence:
                entry.unlink()
                removed += name.endswith(".json")
    if removed or not (folder / "index.json").exists():
        SnapshotStore(folder).rebuild_index()
    return removed


def iso_now(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).isoformat(timespec="seconds") \
        .replace("+00:00", "Z")
