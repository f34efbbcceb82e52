"""Checkpoint and resume of a learning run: the whole state written between batches, and
taken up again by a run started with the same command.

:class:`RunCheckpoint` reads the checkpoint a run resumes from (falling back to the
previous one when it is damaged, refusing one written for another job), decides when the
next one is due (every ``checkpoint_every`` records, every ``checkpoint_seconds``, or when
a broker source holds as many unacknowledged messages as it may), writes it, and only
then lets the source and the label feed acknowledge what it covers. The file format is
:mod:`stream.run.checkpoint`.
"""

from __future__ import annotations

import os
from typing import Any, Callable, Protocol

from stream.errors import ConfigError, ModelFileError

from .attempts import note_checkpointed
from .checkpoint import (
    Checkpoint,
    check_fingerprint,
    iso_now,
    job_fingerprint,
    json_ready,
    read_checkpoint,
    restore_task,
    rollback_snapshots,
    task_state,
    write_checkpoint,
)
from .encoding import Encoder
from .job import LearnJob
from .notices import FieldNotices
from .schema import Schema


class CheckpointedRun(Protocol):
    """What a checkpoint holds of a run (:class:`stream.run.engine.LearnRun`)."""

    job: LearnJob
    clock: Callable[[], float]
    wall: Callable[[], float]
    schema: Schema | None
    encoder: Encoder | None
    task: Any
    outputs: Any
    delayed: Any
    source: Any
    position: dict | None
    records: int
    last_time: float | None
    started: float
    prior_seconds: float
    resumes: int
    resumed_at: int | None
    notices: FieldNotices


class RunCheckpoint:
    """The checkpoint file of a run (``job.checkpoint_path``) and when it is due."""

    def __init__(self, job: LearnJob, warn: Callable[[str], None]) -> None:
        self.job = job
        self.warn = warn
        self.path = job.checkpoint_path
        folder = os.path.dirname(os.path.abspath(self.path))
        if os.path.isdir(self.path):
            raise ConfigError(f"checkpoint {self.path!r} is a folder; a run keeps its "
                              f"checkpoint in a file (a folder is for --by)")
        if not os.path.isdir(folder):
            raise ConfigError(f"cannot keep checkpoint {self.path!r}: "
                              f"directory {folder!r} does not exist")
        self.resume: Checkpoint | None = read_checkpoint(self.path, warn)
        if self.resume is not None:
            check_fingerprint(self.resume.meta["job"], job_fingerprint(job), self.resume.path)
        self.written = 0
        self.last: dict | None = None
        self.last_at = 0.0
        self.since = 0          # records since the last checkpoint
        self.uncommitted = 0    # records the source has not acknowledged
        # the source's fencing check, run before a checkpoint file changes (a learner
        # superseded by a later one must not write; connectors.fencing)
        self.guard: Callable[[], None] | None = None

    def resumed_outputs(self) -> dict | None:
        """Lengths of the appended outputs at the checkpoint resumed from, else None."""
        return self.resume.meta["outputs"] if self.resume is not None else None

    def resumed_position(self) -> dict | None:
        """The source position the resumed checkpoint holds, else None."""
        return self.resume.meta.get("source") if self.resume is not None else None

    def grown(self, records: int) -> None:
        """``records`` more records were read and learned (or quarantined)."""
        self.uncommitted += records
        self.since += records

    def due(self, records: int, now: float, limit: int | None) -> bool:
        """Whether a checkpoint is due after ``records`` records in all."""
        every, seconds = self.job.checkpoint_every, self.job.checkpoint_seconds
        return bool((every and records // every > (records - self.since) // every) or
                    (seconds and now - self.last_at >= seconds) or
                    (limit is not None and self.uncommitted >= limit))

    def due_while_idle(self, now: float) -> bool:
        """Whether a checkpoint is due by time while the feed is quiet."""
        seconds = self.job.checkpoint_seconds
        return bool(seconds and self.since and now - self.last_at >= seconds)

    def write(self, run: CheckpointedRun) -> None:
        """Write the whole state of ``run``, then let its source and label feed commit."""
        started = run.clock()
        meta, arrays = task_state(run.task)
        meta.update({
            "written_at": iso_now(run.wall()),
            "job": job_fingerprint(self.job),
            "schema": run.schema.to_dict(),
            "encoder": run.encoder.state_dict(),
            "run": json_ready(self._run_state(run)),
            "source": json_ready(run.position),
            "outputs": run.outputs.lengths(),
            "labels_source": None, "labels": None,
            "alerts": run.alerts.state() if run.alerts is not None else None,
        })
        if run.delayed is not None:
            labels_meta, label_arrays = run.delayed.state()
            meta.update(labels_meta)
            arrays.update(label_arrays)
        size = write_checkpoint(self.path, meta, arrays, self.guard)
        if self.written == 0 and self.job.snapshot_dir:
            note_checkpointed(self.job.snapshot_dir)
        self.written += 1
        self.last = {"records": run.records, "bytes": size,
                     "seconds": round(run.clock() - started, 6)}
        self.last_at = run.clock()
        self.since = 0
        if run.position is not None and hasattr(run.source, "commit"):
            run.source.commit(run.position)
        if run.delayed is not None:
            run.delayed.commit()
        self.uncommitted = 0

    def _run_state(self, run: CheckpointedRun) -> dict:
        outputs = run.outputs.state(run.clock())
        return {
            "records": run.records, "quarantined": outputs["quarantined"],
            "learned": run.task.records_learned,
            "snapshots_written": outputs["snapshots_written"],
            "last_snapshot_records": outputs["last_snapshot_records"],
            "snapshot_sequence": outputs["snapshot_sequence"],
            "schedule": outputs["schedule"], "last_time": run.last_time,
            "recent_events": outputs["recent_events"],
            "seconds": run.prior_seconds + (run.clock() - run.started),
            "resumes": run.resumes, "checkpoints": self.written + 1,
            "text_in_numbers": dict(run.notices.text_in_numbers),
            "beyond_class_cap": run.notices.beyond_class_cap,
        }

    def restore(self, run: CheckpointedRun) -> None:
        """Give ``run`` the state of the checkpoint resumed from (the source is sought
        when it is opened)."""
        checkpoint = self.resume
        meta = checkpoint.meta
        try:
            schema = Schema.from_dict(meta["schema"])
            if run.schema is not None and run.schema.to_dict() == schema.to_dict():
                schema = run.schema     # the same: keep the run's (columns read for it fit)
            encoder = Encoder.from_state(schema, meta["encoder"])
        except (KeyError, TypeError, ValueError, ConfigError) as exc:
            raise ModelFileError(f"{checkpoint.path!r} holds no usable schema or "
                                 f"encoder: {exc}") from exc
        if run.schema is not None and run.schema is not schema:
            raise ConfigError(f"checkpoint {checkpoint.path!r} was written with another "
                              f"schema than {self.job.schema_path!r} holds now; remove "
                              f"the checkpoint to start over")
        run.schema, run.encoder = schema, encoder
        run.task = restore_task(checkpoint)
        state = meta["run"]
        run.records = int(state["records"])
        run.outputs.restore(state, run.clock())
        run.last_time = state["last_time"]
        run.prior_seconds = float(state["seconds"])
        run.resumes = int(state["resumes"]) + 1
        counts = state.get("text_in_numbers", {})     # absent in older checkpoints
        if not isinstance(counts, dict):
            raise ModelFileError(f"{checkpoint.path!r}: its 'text_in_numbers' is not an "
                                 "object")
        run.notices.restored(encoder, {str(k): int(v) for k, v in counts.items()})
        run.notices.beyond_class_cap = int(state.get("beyond_class_cap", 0))
        if (encoder.category_cap, encoder.class_cap) != (self.job.category_cap,
                                                         self.job.class_cap):
            self.warn(f"the checkpoint keeps its category cap {encoder.category_cap:,} and "
                      f"class cap {encoder.class_cap:,}: codes given out stay as they are")
        if run.alerts is not None and meta.get("alerts") is not None:
            try:
                run.alerts.restore(meta["alerts"])
            except (KeyError, TypeError, ValueError) as exc:
                raise ModelFileError(f"{checkpoint.path!r}: its alert state is not "
                                     f"usable: {exc}") from exc
        run.resumed_at = run.records
        self.written = 0
        if run.outputs.snapshots is not None:
            rollback_snapshots(self.job.snapshot_dir, run.outputs.snapshot_sequence)
        run.position = meta.get("source")
        if run.delayed is not None:
            run.delayed.restore(checkpoint)
