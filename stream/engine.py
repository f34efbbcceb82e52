"""A learning run: source -> encode -> score then learn -> metrics, snapshots, summary.

:class:`LearnJob` says what to read and where outputs go; :func:`run_learn` carries it
out and returns the summary (also written as JSON when asked). The clock is passed in,
so tests can run on a fake one. Each record is scored before it is learned; batches are
cut at metric-log and snapshot boundaries so that every logged value and every snapshot
is taken exactly at its record count, whatever the batch size. The schema, when not
declared, is inferred from the first ``INFER_ROWS`` records, whatever the batch size
(in follow mode from fewer if the file holds fewer when the reader first catches up).

Checkpoints (``LearnJob.checkpoint_path``, see :mod:`stream.checkpoint`) are written
between fully learned batches: every ``checkpoint_every`` records and/or
``checkpoint_seconds`` seconds (at the first batch end after the interval; batches are
cut to at most ``checkpoint_every`` records), at the end of the stream and on a stop.
The checkpoint holds the source position of the last learned batch; only after it is
durable is the source told to ``commit`` it (a broker acknowledges then). A run whose
checkpoint exists resumes from it: state restored, outputs cut back to their lengths at
the checkpoint, later snapshots removed, the source sought to the position. Results
then equal an uninterrupted run's.

SIGINT and SIGTERM (when checkpointing or following): the batch being learned is
finished, a checkpoint written, the summary written, and the run returns normally (the
CLI exits 0). A second signal interrupts at once.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import signal
import sys
import threading
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, TextIO

import numpy as np
import pandas as pd

from connectors.base import RawBatch
from connectors.broker_payloads import redacted, scheme_of
from connectors.follow import FollowControl, FollowStopped
from connectors.quarantine import QuarantineWriter
from connectors.sources import open_sources

from .atomic import write_atomic
from .checkpoint import (ResumableOutput, check_fingerprint, fsync_length, iso_now,
                         job_fingerprint, json_ready, read_checkpoint, restore_task,
                         rollback_snapshots, task_state, truncate_for_resume,
                         write_checkpoint)
from .encoding import EncodedBatch, Encoder
from .errors import ConfigError, ModelFileError, RecordError
from .regression_settings import RegressionSettings
from .rules import conditions_text, node_conditions, render_text, rules_payload
from .saved_model import save_model
from .schema import Schema, infer_schema, load_schema
from .settings import TreeSettings, require_float, require_int
from .snapshots import SnapshotSchedule, SnapshotStore
from .tasks import TASKS

DEFAULT_QUARANTINE = "sapwood-quarantine.jsonl"
DEFAULT_CHECKPOINT_EVERY = 100_000
DEFAULT_CHECKPOINT_SECONDS = 60.0
DEFAULT_LABEL_WINDOW = 10_000
INFER_ROWS = 10_000
"""Records the schema is inferred from when it is not declared."""


@dataclasses.dataclass
class LearnJob:
    """What a learning run reads, how it learns and where its outputs go.

    ``settings`` fixes the learner's settings outright (a :class:`TreeSettings` for a
    class target, a :class:`RegressionSettings` for a numeric one); otherwise
    ``options`` (the user's choices by name, e.g. ``{"grace_period": 100}``) are applied
    to the defaults of whichever task the target calls for. Paths left as None are not
    written, except the quarantine: rejected records always go to a file
    (``DEFAULT_QUARANTINE`` unless named), created at the first reject.

    Durability and live feeds: ``checkpoint_path`` with ``checkpoint_every`` (records,
    0 for none) and ``checkpoint_seconds`` (0 for none); ``follow`` reads the last
    source on as it grows (``poll_seconds`` between checks, ``idle_exit`` ends the run
    after that many quiet seconds). With a checkpoint, a fresh run empties an existing
    quarantine file (otherwise appended to), as an attempt that died before its first
    checkpoint may have written to it. Delayed labels: ``labels`` (sources of id, target
    and time rows), joined within ``label_window`` records and, if set,
    ``label_seconds`` of data time; ``id_field`` declares the id field (see
    :mod:`stream.delayed_labels`).
    """

    sources: list[str]
    target: str
    fmt: str | None = None
    schema_path: str | None = None
    declared: dict[str, str] = dataclasses.field(default_factory=dict)
    task: str | None = None
    settings: TreeSettings | RegressionSettings | None = None
    options: dict[str, Any] = dataclasses.field(default_factory=dict)
    summary_path: str | None = None
    save_path: str | None = None
    snapshot_dir: str | None = None
    snapshot_every: int = 0
    snapshot_seconds: float = 0.0
    snapshot_keep: int | None = None
    snapshot_history: bool = False
    metrics_path: str | None = None
    metrics_every: int = 1000
    quarantine_path: str | None = None
    strict: bool = False
    predictions_path: str | None = None
    events_path: str | None = None
    window: int = 1000
    fading: float = 0.999
    batch_rows: int = 65536
    checkpoint_path: str | None = None
    checkpoint_every: int = DEFAULT_CHECKPOINT_EVERY
    checkpoint_seconds: float = DEFAULT_CHECKPOINT_SECONDS
    follow: bool = False
    poll_seconds: float = 0.5
    idle_exit: float | None = None
    labels: list[str] = dataclasses.field(default_factory=list)
    label_window: int = DEFAULT_LABEL_WINDOW
    label_seconds: float = 0.0
    id_field: str | None = None

    def __post_init__(self) -> None:
        require_int("checkpoint interval", self.checkpoint_every, 0)
        require_float("checkpoint interval in seconds", self.checkpoint_seconds, 0.0,
                      math.inf, low_open=False)
        require_float("poll interval in seconds", self.poll_seconds, 0.0, math.inf)
        if self.idle_exit is not None:
            require_float("idle exit in seconds", self.idle_exit, 0.0, math.inf,
                          low_open=False)
        require_int("label window", self.label_window, 1)
        require_float("label window in seconds", self.label_seconds, 0.0, math.inf,
                      low_open=False)
        self.labels = list(self.labels)
        if self.id_field is not None:
            kind = self.declared.get(self.id_field, "id")
            if kind != "id":
                raise ConfigError(f"--id-field {self.id_field!r} is also declared "
                                  f"{kind!r}; a field has one kind")
            self.declared = {**self.declared, self.id_field: "id"}
        require_int("snapshot interval", self.snapshot_every, 0)
        require_float("snapshot interval in seconds", self.snapshot_seconds, 0.0, math.inf,
                      low_open=False)
        require_int("metrics interval", self.metrics_every, 1)
        require_int("window", self.window, 1)
        if (self.snapshot_every or self.snapshot_seconds) and not self.snapshot_dir:
            raise ConfigError("a snapshot interval needs a snapshot directory")

    def learner_settings(self, task: str):
        """The settings the learner of ``task`` runs with."""
        from .tasks import classifier_settings, regressor_settings

        if self.settings is not None:
            wanted = TreeSettings if task == "classification" else RegressionSettings
            if not isinstance(self.settings, wanted):
                raise ConfigError(f"the target calls for {task} but the settings given are "
                                  f"{type(self.settings).__name__}")
            return self.settings
        if task == "classification":
            return classifier_settings(self.options)
        return regressor_settings(self.options)


class _LazyQuarantine:
    """A quarantine file that is created only when the first reject arrives."""

    def __init__(self, path: str) -> None:
        self.path = path
        self._writer: QuarantineWriter | None = None
        self.count = 0

    def write(self, rejects) -> None:
        """Append the rejects of one batch; ``count`` grows by the records they name
        (a record with two bad fields has two entries but is one record)."""
        if not rejects:
            return
        if self._writer is None:
            self._writer = QuarantineWriter(self.path)
        self._writer.write(rejects)
        self.count += len({(r.origin, r.line) for r in rejects})

    def close(self) -> None:
        if self._writer is not None:
            self._writer.close()


class _BrokerPredictionSink:
    """Per-record predictions published to an MQTT topic or appended to a Redis stream.

    A resumed run publishes again what it predicted after its last checkpoint (at least
    once, never fewer): a broker cannot take back what it was sent.
    """

    file = None

    def __init__(self, spec: str) -> None:
        from connectors.sinks import open_prediction_sink
        self.sink = open_prediction_sink(spec)

    def write(self, batch: EncodedBatch, columns: dict) -> None:
        frame = pd.DataFrame({"origin": batch.origin, "line": batch.lines, **columns})
        if batch.ids is not None:
            frame.insert(2, "id", batch.ids)
        if len(frame):
            self.sink.write(frame)

    def close(self) -> None:
        self.sink.close()


def _open_prediction_sink(spec: str, stdout: TextIO, resume_bytes: int | None):
    """A broker sink when ``spec`` is an ``mqtt[s]://`` or ``redis[s]://`` URL, else a file
    (``-`` for standard output)."""
    if scheme_of(spec) in ("mqtt", "mqtts", "redis", "rediss"):
        return _BrokerPredictionSink(spec)
    return _PredictionSink(spec, stdout, resume_bytes)


class _PredictionSink:
    """Per-record predictions as JSON lines (or CSV when the name ends in .csv)."""

    def __init__(self, path: str, stdout: TextIO, resume_bytes: int | None = None) -> None:
        self.csv = path.endswith(".csv")
        self.file = None if path == "-" else ResumableOutput(path, resume_bytes,
                                                             "predictions file")
        self._out = stdout if self.file is None else self.file.handle
        self._own = path != "-"
        self._header = not resume_bytes

    def write(self, batch: EncodedBatch, columns: dict) -> None:
        frame = pd.DataFrame({"origin": batch.origin, "line": batch.lines, **columns})
        if batch.ids is not None:
            frame.insert(2, "id", batch.ids)
        if not len(frame):
            return
        if self.csv:
            self._out.write(frame.to_csv(index=False, header=self._header))
        else:
            text = frame.to_json(orient="records", lines=True)
            self._out.write(text if text.endswith("\n") else text + "\n")
        self._header = False
        self._out.flush()

    def close(self) -> None:
        if self._own:
            self._out.close()


def _json_default(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return None if not math.isfinite(value) else float(value)
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def _iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).isoformat(timespec="seconds") \
        .replace("+00:00", "Z")


def _first_reject(rejects):
    return min(rejects, key=lambda r: (r.line, r.field or ""))


class LearnRun:
    """State of one learning run; :meth:`run` drives it to the end of the stream.

    ``warn`` receives messages for the operator (a damaged checkpoint fallen back from);
    stderr by default.
    """

    def __init__(self, job: LearnJob, clock: Callable[[], float] = time.perf_counter,
                 wall: Callable[[], float] = time.time, stdout: TextIO | None = None,
                 progress: Callable[[dict], None] | None = None,
                 warn: Callable[[str], None] | None = None) -> None:
        self.job = job
        self.clock = clock
        self.wall = wall
        self.stdout = stdout or sys.stdout
        self.progress = progress
        self.warn = warn or (lambda text: print(f"sapwood: warning: {text}",
                                                file=sys.stderr, flush=True))
        self.schema: Schema | None = load_schema(job.schema_path) if job.schema_path else None
        if self.schema is not None and self.schema.target != job.target:
            raise ConfigError(f"the schema's target is {self.schema.target!r} but the "
                              f"target asked for is {job.target!r}")
        self.encoder: Encoder | None = None
        self.task = None
        self.stop = threading.Event()
        self.stopped: str | None = None
        self.position: dict | None = None
        self.checkpoints_written = 0
        self.last_checkpoint: dict | None = None
        self.prior_seconds = 0.0
        self.resumes = 0
        self.resumed_at: int | None = None
        self.snapshot_sequence = 0
        self.delayed = None
        self.resume = None
        if job.checkpoint_path:
            folder = os.path.dirname(os.path.abspath(job.checkpoint_path))
            if not os.path.isdir(folder):
                raise ConfigError(f"cannot keep checkpoint {job.checkpoint_path!r}: "
                                  f"directory {folder!r} does not exist")
            self.resume = read_checkpoint(job.checkpoint_path, self.warn)
            if self.resume is not None:
                check_fingerprint(self.resume.meta["job"], job_fingerprint(job),
                                  self.resume.path)
        appended = self.resume.meta["outputs"] if self.resume is not None else {}

        def resume_bytes(name: str) -> int | None:
            return appended[name]["bytes"] if name in appended else None

        self.quarantine = _LazyQuarantine(job.quarantine_path or DEFAULT_QUARANTINE)
        if self.resume is not None:
            qbytes = resume_bytes("quarantine")
            if qbytes is None and os.path.exists(self.quarantine.path):
                os.unlink(self.quarantine.path)  # created after the checkpoint
            else:
                truncate_for_resume(self.quarantine.path, qbytes, "quarantine file")
        elif job.checkpoint_path and os.path.exists(self.quarantine.path):
            # a checkpointed run starts its quarantine afresh, like its other outputs:
            # what is there may come from an attempt that died before its first checkpoint
            os.truncate(self.quarantine.path, 0)
        self.snapshots = None
        if job.snapshot_dir:
            try:
                Path(job.snapshot_dir).mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise ConfigError(f"cannot use snapshot directory {job.snapshot_dir!r}: "
                                  f"{exc.strerror or exc}") from exc
            self.snapshots = SnapshotStore(job.snapshot_dir, keep=job.snapshot_keep,
                                           history=job.snapshot_history)
        self.schedule = SnapshotSchedule(job.snapshot_every, job.snapshot_seconds,
                                         clock=clock) \
            if job.snapshot_every or job.snapshot_seconds else None
        self.appended: dict[str, ResumableOutput] = {}
        for name, path, what in (("metrics", job.metrics_path, "metrics log"),
                                 ("events", job.events_path, "events file")):
            if path:
                self.appended[name] = ResumableOutput(path, resume_bytes(name), what)
        self.metrics_out = self.appended["metrics"].handle if "metrics" in self.appended \
            else None
        self.events_out = self.appended["events"].handle if "events" in self.appended \
            else None
        self.predictions = _open_prediction_sink(job.predictions_path, self.stdout,
                                                 resume_bytes("predictions")) \
            if job.predictions_path else None
        if self.predictions is not None and self.predictions.file is not None:
            self.appended["predictions"] = self.predictions.file
        self.recent_events: list[dict] = []
        self.records = 0
        self.snapshots_written = 0
        self.last_snapshot_records: int | None = None
        self.saved = False
        self.last_time: float | None = None
        self.started = 0.0
        self.finished = 0.0
        self.startup_seconds = 0.0
        self.source = None
        if self.snapshots is not None:
            self.snapshot_sequence = _highest_snapshot(self.snapshots)
        if job.labels:
            from .delayed_labels import DelayedLabels

            self.delayed = DelayedLabels(self)
        if self.resume is not None:
            self._restore(self.resume)
        elif self.schema is not None:
            self._start(self.schema)

    # ------------------------------------------------------------------ setup
    def _start(self, schema: Schema) -> None:
        job = self.job
        self.schema = schema
        self.encoder = Encoder(schema)
        settings = job.learner_settings(schema.task)
        self.task = TASKS[schema.task].create(schema, settings, job.window, job.fading,
                                              job.metrics_every)

    @property
    def model(self):
        """The learner (a TreeClassifier or TreeRegressor), None before the schema."""
        return self.task.model if self.task is not None else None

    # ------------------------------------------------------------------ the run
    def run(self) -> dict:
        """Learn the stream to its end (or until stopped); returns the summary."""
        job = self.job
        warm = self.clock()
        warm_up()
        self.startup_seconds = self.clock() - warm
        self.started = self.clock()
        self.last_checkpoint_at = self.started
        follow = FollowControl(job.poll_seconds, job.idle_exit, self.stop,
                               on_idle=self._on_idle) if job.follow else None
        batch_rows = job.batch_rows
        if job.checkpoint_path and job.checkpoint_every:
            # checkpoints fall between batches: no batch may outgrow the interval
            batch_rows = min(batch_rows, job.checkpoint_every)
        self.source = open_sources(job.sources, job.fmt, batch_rows, follow=follow)
        if job.checkpoint_path and not getattr(self.source, "resumable", True) \
                or job.checkpoint_path and not hasattr(self.source, "seek"):
            self.source.close()
            raise ConfigError("a checkpoint needs sources it can return to (files or a "
                              "broker); standard input cannot be read again")
        if self.resume is not None and self.resume.meta.get("source") is not None:
            self.source.seek(self.resume.meta["source"])
        if self.delayed is not None:
            self.delayed.open(batch_rows)
        self.uncommitted = 0
        self.since_checkpoint = 0
        self._pending = []
        handlers = self._catch_signals() if job.checkpoint_path or job.follow else {}
        try:
            try:
                self._read_all()
            except FollowStopped as exc:
                self.stopped = self.stopped or exc.reason
            if self.stopped is None and self.delayed is not None:
                self.delayed.finish()
                if not job.checkpoint_path:
                    self.delayed.commit()   # nothing durable to wait for
            self.finished = self.clock()
            if self.stopped is None and self.snapshots is not None \
                    and self.task is not None \
                    and self.last_snapshot_records != self.task.records_learned:
                self._snapshot()
            if job.checkpoint_path and self.task is not None:
                self.write_checkpoint()
        finally:
            for signum, handler in handlers.items():
                signal.signal(signum, handler)
            self.source.close()
            if self.delayed is not None:
                self.delayed.close()
            self._close_outputs()
        if job.save_path and self.task is not None:
            self.save(job.save_path)
        summary = self.summary()
        if job.summary_path:
            write_atomic(job.summary_path, json.dumps(summary, indent=2,
                                                      default=_json_default) + "\n")
        return summary

    def _read_all(self) -> None:
        """Every batch of the source, through schema inference, learning and checkpoints."""
        self._pending: list[RawBatch] = []
        try:
            for batch in self.source.batches():
                if self.task is None:
                    self._pending.append(batch)
                    if sum(len(b) for b in self._pending) >= INFER_ROWS:
                        self._learn_pending()
                else:
                    self._consume(batch)
                    self._after_batch(batch)
                if self.stop.is_set():
                    break
        finally:
            # read but not yet learned (a stop or the end came during inference)
            if self._pending and sys.exc_info()[0] in (None, FollowStopped):
                self._learn_pending()

    def _learn_pending(self) -> None:
        """Infer the schema from the batches held back, then learn them."""
        pending, self._pending = self._pending, []
        self._infer(pending)
        for held in pending:
            self._consume(held)
            self._after_batch(held)

    def _on_idle(self) -> None:
        """A followed file has no new line for now (called from inside the source's
        iteration, between two batches): a slow feed is not held back until
        ``INFER_ROWS`` records have come, and a checkpoint due by time is written."""
        if self.task is None:
            if self._pending:
                self._learn_pending()
            return
        job = self.job
        if job.checkpoint_path and job.checkpoint_seconds and self.since_checkpoint and \
                self.clock() - self.last_checkpoint_at >= job.checkpoint_seconds:
            self.write_checkpoint()

    def _after_batch(self, batch: RawBatch) -> None:
        """Remember where the source stands; checkpoint or acknowledge when due."""
        if batch.position is not None:
            self.position = batch.position
        grown = self.records - getattr(self, "_records_seen", 0)
        self._records_seen = self.records
        self.uncommitted += grown
        self.since_checkpoint += grown
        job = self.job
        if not job.checkpoint_path:
            if self.position is not None and hasattr(self.source, "commit"):
                self.source.commit(self.position)  # nothing durable to wait for
            if self.delayed is not None:
                self.delayed.commit()
            return
        limit = getattr(self.source, "max_uncommitted", None)
        every = job.checkpoint_every
        due = (every and (self.records // every >
                          (self.records - self.since_checkpoint) // every)) or \
            (job.checkpoint_seconds and
             self.clock() - self.last_checkpoint_at >= job.checkpoint_seconds) or \
            (limit is not None and self.uncommitted >= limit)
        if due:
            self.write_checkpoint()

    # ------------------------------------------------------------------ stopping
    def _catch_signals(self) -> dict:
        """SIGINT/SIGTERM ask the run to stop after the current batch (main thread only)."""
        if threading.current_thread() is not threading.main_thread():
            return {}
        previous = {}
        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, self._on_signal)
        return previous

    def _on_signal(self, signum, frame) -> None:
        if self.stop.is_set():
            raise KeyboardInterrupt  # a second signal: stop now
        self.stopped = signal.Signals(signum).name
        self.stop.set()

    # ------------------------------------------------------------------ checkpoints
    def write_checkpoint(self) -> None:
        """Write the whole state to the checkpoint, then let the source commit."""
        started = self.clock()
        outputs = {name: {"path": out.path, "bytes": out.durable_length()}
                   for name, out in self.appended.items()}
        qpath = self.quarantine.path  # the writer flushes after every batch
        outputs["quarantine"] = {"path": qpath, "bytes": fsync_length(qpath)
                                 if os.path.exists(qpath) else None}
        meta, arrays = task_state(self.task)
        schedule = None
        if self.schedule is not None:
            schedule = {"last_records": self.schedule.last_records,
                        "seconds_since": max(self.clock() - self.schedule.last_time, 0.0)}
        meta.update({
            "written_at": iso_now(self.wall()),
            "job": job_fingerprint(self.job),
            "schema": self.schema.to_dict(),
            "encoder": self.encoder.state_dict(),
            "run": json_ready({
                "records": self.records, "quarantined": self.quarantine.count,
                "learned": self.task.records_learned,
                "snapshots_written": self.snapshots_written,
                "last_snapshot_records": self.last_snapshot_records,
                "snapshot_sequence": self.snapshot_sequence,
                "schedule": schedule, "last_time": self.last_time,
                "recent_events": self.recent_events,
                "seconds": self.prior_seconds + (self.clock() - self.started),
                "resumes": self.resumes, "checkpoints": self.checkpoints_written + 1,
            }),
            "source": json_ready(self.position),
            "outputs": outputs,
            "labels_source": None, "labels": None,
        })
        if self.delayed is not None:
            labels_meta, label_arrays = self.delayed.state()
            meta.update(labels_meta)
            arrays.update(label_arrays)
        size = write_checkpoint(self.job.checkpoint_path, meta, arrays)
        self.checkpoints_written += 1
        self.last_checkpoint = {"records": self.records, "bytes": size,
                                "seconds": round(self.clock() - started, 6)}
        self.last_checkpoint_at = self.clock()
        self.since_checkpoint = 0
        if self.position is not None and hasattr(self.source, "commit"):
            self.source.commit(self.position)
        if self.delayed is not None:
            self.delayed.commit()
        self.uncommitted = 0

    def _restore(self, checkpoint) -> None:
        """Take up the state a checkpoint holds (the source is sought in :meth:`run`)."""
        from .schema import Schema as _Schema

        meta = checkpoint.meta
        try:
            schema = _Schema.from_dict(meta["schema"])
            encoder = Encoder.from_state(schema, meta["encoder"])
        except (KeyError, TypeError, ValueError, ConfigError) as exc:
            raise ModelFileError(f"{checkpoint.path!r} holds no usable schema or "
                                 f"encoder: {exc}") from exc
        if self.schema is not None and self.schema.to_dict() != schema.to_dict():
            raise ConfigError(f"checkpoint {checkpoint.path!r} was written with another "
                              f"schema than {self.job.schema_path!r} holds now; remove "
                              f"the checkpoint to start over")
        self.schema, self.encoder = schema, encoder
        self.task = restore_task(checkpoint)
        run = meta["run"]
        self.records = int(run["records"])
        self._records_seen = self.records
        self.quarantine.count = int(run["quarantined"])
        self.snapshots_written = int(run["snapshots_written"])
        self.last_snapshot_records = run["last_snapshot_records"]
        self.last_time = run["last_time"]
        self.recent_events = list(run["recent_events"])
        self.prior_seconds = float(run["seconds"])
        self.resumes = int(run["resumes"]) + 1
        self.resumed_at = self.records
        self.checkpoints_written = 0
        self.snapshot_sequence = int(run["snapshot_sequence"])
        if self.snapshots is not None:
            rollback_snapshots(self.job.snapshot_dir, self.snapshot_sequence)
        if self.schedule is not None and run.get("schedule"):
            self.schedule.last_records = int(run["schedule"]["last_records"])
            self.schedule.last_time = self.clock() - float(run["schedule"]["seconds_since"])
        self.position = meta.get("source")
        if self.delayed is not None:
            self.delayed.restore(checkpoint)

    def _infer(self, pending: list[RawBatch]) -> None:
        frames = [b.frame for b in pending if len(b.frame)]
        if not frames:     # nothing but rejects so far: infer from what there is
            frames = [pending[0].frame]
        prefix = pd.concat(frames, ignore_index=True).iloc[:INFER_ROWS]
        if self.delayed is not None and self.job.target not in prefix.columns:
            if self.job.task is None:
                raise ConfigError(f"the records carry no {self.job.target!r} (their labels "
                                  f"come from --labels): give --task or --schema")
            prefix = prefix.assign(**{self.job.target: np.nan})
        self._start(infer_schema(prefix, self.job.target, self.job.task, self.job.declared))

    def _close_outputs(self) -> None:
        """Close every output file; safe to call twice."""
        self.quarantine.close()
        for out in (self.metrics_out, self.events_out):
            if out is not None:
                out.close()
        if self.predictions is not None:
            self.predictions.close()

    def _consume(self, raw: RawBatch) -> None:
        batch = self.encode(raw, labels_optional=self.delayed is not None)
        if self.delayed is not None:
            self.delayed.consume(batch)
        else:
            self.learn_stretch(batch)
        if self.progress is not None:
            self.progress(self._progress_facts())

    def encode(self, raw: RawBatch, labels_optional: bool = False,
               count: bool = True) -> EncodedBatch:
        """Encode a raw batch; rejects go to quarantine (or stop a strict run).
        ``labels_optional`` keeps records without a target (delayed labels)."""
        batch = self.encoder.encode(raw, scoring=labels_optional)
        if batch.rejects and self.job.strict:
            raise RecordError(_first_reject(batch.rejects).message() +
                              " (strict mode stops here)")
        before = self.quarantine.count
        self.quarantine.write(sorted(batch.rejects, key=lambda r: (r.line, r.field or "")))
        if count:
            self.records += len(batch) + self.quarantine.count - before
        return batch

    def emit_predictions(self, batch: EncodedBatch, part: slice, scored) -> None:
        """Write the predictions of ``batch[part]`` (delayed labels: at arrival)."""
        if self.predictions is not None:
            self.predictions.write(_slice_batch(batch, part),
                                   self.task.prediction_columns(scored, self.encoder))

    def learn_stretch(self, batch: EncodedBatch, arrival=None) -> None:
        """Score then learn every record of ``batch`` (all labelled), in order.

        Batches are cut at metric-log and snapshot boundaries. ``arrival``: the
        predictions made when the records arrived (delayed labels), scored instead of
        the learner's own; predictions are then not written again.
        """
        start = 0
        n = len(batch)
        while start < n:
            stop = min(n, start + self._until_boundary())
            part = slice(start, stop)
            learned_before = self.task.records_learned
            scored = self.task.learn(batch.X[part], batch.y[part], self.encoder)
            self._note_time(batch.times, stop - 1)
            self._write_events(batch, start - learned_before)
            judged = scored if arrival is None else arrival.part(part)
            rows = self.task.update_score(batch.y[part], judged, self.encoder)
            if self.predictions is not None and arrival is None:
                self.predictions.write(_slice_batch(batch, part),
                                       self.task.prediction_columns(scored, self.encoder))
            for row in rows:
                self._log(row)
            if self.schedule is not None and self.schedule.due(self.task.records_learned):
                self._snapshot()
            start = stop

    def _note_time(self, times: np.ndarray | None, index: int) -> None:
        """Remember the latest record time seen (the data's own clock), if any."""
        if times is not None and index >= 0 and np.isfinite(times[index]):
            self.last_time = float(times[index])

    def _write_events(self, batch: EncodedBatch, offset: int) -> None:
        """Drift events of the last learn call: to the events file and the next snapshot.
        ``offset`` turns a record count into an index of ``batch``."""
        for event in self.task.take_events():
            index = event.record + offset
            when = None
            if batch.times is not None and 0 <= index < len(batch.times) \
                    and np.isfinite(batch.times[index]):
                when = _iso(float(batch.times[index]))
            conditions = event.path if getattr(event, "path", None) is not None else \
                node_conditions(self.model, event.node, self.encoder.categories)
            row = {
                "record": event.record + 1, "time": when or _iso(self.wall()),
                "time_source": "data" if when else "clock", "kind": event.kind,
                "node": event.node,
                "alternate": event.other if event.other >= 0 else None,
                "detector": self.task.settings.detector,
                "error_before": round(event.before, 6), "error_after": round(event.after, 6),
                "where": conditions_text(conditions),
                "path": [c.to_dict() for c in conditions],
            }
            self.recent_events.append(row)
            if self.events_out is not None:
                self.events_out.write(json.dumps(row) + "\n")
        if self.events_out is not None:
            self.events_out.flush()

    def _until_boundary(self) -> int:
        learned = self.task.records_learned
        gap = self.job.metrics_every - learned % self.job.metrics_every
        if self.schedule is None:
            return gap
        to_snapshot = self.schedule.records_to_boundary(learned)
        return min(gap, to_snapshot) if to_snapshot else gap

    # ------------------------------------------------------------------ outputs
    def _log(self, row: dict) -> None:
        if self.metrics_out is None:
            return
        row = dict(row)
        row["leaves"] = self.model.n_leaves
        row["depth"] = self.model.depth
        row["time"] = _iso(self.last_time) if self.last_time is not None else None
        self.metrics_out.write(json.dumps(row, default=_json_default) + "\n")
        self.metrics_out.flush()

    def header(self) -> dict:
        """Facts that head a rule listing or snapshot."""
        header = {"target": self.job.target,
                  "task": self.task.name if self.task else None,
                  "classes": self.encoder.classes if self.encoder else [],
                  "records": self.task.records_learned if self.task else 0,
                  "data_time": _iso(self.last_time) if self.last_time is not None else None}
        if self.task is not None:
            header.update(self.task.headline(self.task.result(self.encoder)))
        return header

    def rules(self):
        return self.task.rules(self.encoder.categories)

    def _snapshot(self) -> None:
        rules = self.rules()
        header = self.header()
        result = self.task.result(self.encoder)
        payload = rules_payload(rules, {k: v for k, v in header.items() if k != "records"})
        payload["metrics"] = result
        payload["tree"] = self._tree_facts()
        payload["events"] = self.recent_events
        payload["headline"] = {**self.task.headline(result), "rules": len(rules),
                               "leaves": self.model.n_leaves, "depth": self.model.depth}
        self.recent_events = []
        now = self.wall()
        text = render_text(rules, {**header, "written_at": _iso(now)})
        learned = self.task.records_learned
        entry = self.snapshots.write(learned, payload, text, now)
        self.snapshot_sequence = entry["sequence"]
        if self.schedule is not None:
            self.schedule.taken(learned)
        self.snapshots_written += 1
        self.last_snapshot_records = learned

    def _tree_facts(self) -> dict:
        m = self.model
        return {"nodes": m.n_nodes, "leaves": m.n_leaves, "active_leaves": m.n_active_leaves,
                "depth": m.depth, **m.counters()}

    def _progress_facts(self) -> dict:
        elapsed = max(self.clock() - self.started, 1e-9)
        facts = {"records": self.records, "quarantined": self.quarantine.count,
                 "seconds": elapsed, "rate": self.records / elapsed}
        bytes_read = getattr(self.source, "bytes_read", None)
        if callable(bytes_read):
            facts["bytes_read"] = bytes_read()
        return facts

    def save(self, path: str) -> None:
        """Write the learner, encoder, schema and metrics to a model file."""
        save_model(path, self.schema, self.encoder, self.task, {
            "records": self.records, "quarantined": self.quarantine.count,
            "target": self.job.target})
        self.saved = True

    def summary(self) -> dict:
        """The run's summary (the contract other tools rely on, plus details)."""
        seconds = self.prior_seconds + max(self.finished - self.started, 0.0)
        task = self.task
        m = self.model
        drift = m.counters() if m else {}
        summary = {
            "records": self.records,
            "learned": task.records_learned if task else 0,
            "quarantined": self.quarantine.count,
            "task": self.schema.task if self.schema else None,
            "target": self.job.target,
        }
        if task is not None:
            summary.update(task.summary_figures(task.result(self.encoder)))
        elif (self.job.task or "classification") == "classification":
            summary.update({"accuracy": None, "kappa": None})
        else:
            summary.update({"mae": None, "rmse": None, "r2": None})
        settings = task.settings if task else None
        summary.update({
            "leaves": m.n_leaves if m else 0, "depth": m.depth if m else 0,
            "drift_alarms": drift.get("drift_alarms", 0),
            "swaps": drift.get("alternates_swapped", 0),
            "alternates_started": drift.get("alternates_started", 0),
            "alternates_dropped": drift.get("alternates_dropped", 0),
            "detector": getattr(settings, "detector", "off") if settings else None,
            "seconds": round(seconds, 6),
            "records_per_second": round(self.records / seconds, 1) if seconds > 0 else None,
            "startup_seconds": round(self.startup_seconds, 3),
            "window": self.job.window,
            "classes": self.encoder.classes if self.encoder else [],
            "tree": self._tree_facts() if m else None,
            "schema": self.schema.to_dict() if self.schema else None,
            "unknown_fields": dict(self.encoder.unknown_fields) if self.encoder else {},
            "sources": [redacted(spec) for spec in self.job.sources],
            "stopped": self.stopped,
            "checkpoint": None if not self.job.checkpoint_path else {
                "path": self.job.checkpoint_path, "written": self.checkpoints_written,
                "resumes": self.resumes, "resumed_at_records": self.resumed_at,
                "last": self.last_checkpoint},
            "labels": self.delayed.summary() if self.delayed is not None else None,
            "outputs": {
                "quarantine": self.quarantine.path if self.quarantine.count else None,
                "snapshots": self.job.snapshot_dir if self.snapshots_written else None,
                "metrics": self.job.metrics_path, "events": self.job.events_path,
                "model": self.job.save_path if self.saved else None,
                "predictions": redacted(self.job.predictions_path)
                if self.job.predictions_path else None,
            },
        })
        return summary


def _highest_snapshot(store: SnapshotStore) -> int:
    """The highest snapshot number in a store's directory (0 for none or unreadable)."""
    try:
        return max((e["sequence"] for e in store.entries()), default=0)
    except (ModelFileError, OSError):
        return 0


def _slice_batch(batch: EncodedBatch, part: slice) -> EncodedBatch:
    return EncodedBatch(batch.X[part], batch.y[part], batch.lines[part], batch.origin,
                        None if batch.times is None else batch.times[part],
                        None if batch.ids is None else batch.ids[part], [])


_WARM = {"done": False}


def warm_up() -> None:
    """Load (or, the first time, compile) the kernels before any source is opened."""
    if _WARM["done"]:
        return
    from .classifier import TreeClassifier
    from .metrics import ClassificationScore, RegressionScore
    from .regressor import warm_up as warm_regressor

    X = np.array([[0.5, 1.0], [0.25, 0.0], [np.nan, 1.0]])
    y = np.array([0, 1, 0], np.int32)
    for observer in ("gaussian", "histogram"):
        for detector in ("adwin", "page_hinkley", "off"):
            model = TreeClassifier(["a", "b"], ["numeric", "category"],
                                   TreeSettings(numeric_observer=observer, grace_period=1,
                                                detector=detector))
            scored = model.learn(X, y, ["p", "q"])
            model.predict(X)
    ClassificationScore(2, 0.9, log_every=1).update(y, scored.pred, 2)
    RegressionScore(2, 0.9, log_every=1).update(np.ones(3), np.zeros(3))
    warm_regressor()
    _WARM["done"] = True


def run_learn(job: LearnJob, **kwargs) -> dict:
    """Carry out ``job``; returns the summary. See :class:`LearnRun` for the keywords."""
    return LearnRun(job, **kwargs).run()
