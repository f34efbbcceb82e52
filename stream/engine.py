"""A learning run: source -> encode -> score then learn -> metrics, snapshots, summary.

:class:`LearnJob` says what to read and where outputs go; :func:`run_learn` carries it
out and returns the summary (also written as JSON when asked). The clock is passed in,
so tests can run on a fake one. Each record is scored before it is learned; batches are
cut at metric-log and snapshot boundaries so that every logged value and every snapshot
is taken exactly at its record count, whatever the batch size. The schema, when not
declared, is inferred from the first ``INFER_ROWS`` records, whatever the batch size.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, TextIO

import numpy as np
import pandas as pd

from connectors.base import RawBatch
from connectors.broker_payloads import redacted
from connectors.quarantine import QuarantineWriter
from connectors.sources import open_sources

from .atomic import write_atomic
from .encoding import EncodedBatch, Encoder
from .errors import ConfigError, RecordError
from .regression_settings import RegressionSettings
from .rules import conditions_text, node_conditions, render_text, rules_payload
from .saved_model import save_model
from .schema import Schema, infer_schema, load_schema
from .settings import TreeSettings, require_float, require_int
from .snapshots import SnapshotSchedule, SnapshotStore
from .tasks import TASKS

DEFAULT_QUARANTINE = "sapwood-quarantine.jsonl"
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

    def __post_init__(self) -> None:
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


class _PredictionSink:
    """Per-record predictions as JSON lines (or CSV when the name ends in .csv)."""

    def __init__(self, path: str, stdout: TextIO) -> None:
        self.csv = path.endswith(".csv")
        self._out = stdout if path == "-" else open(path, "w", encoding="utf-8")
        self._own = path != "-"
        self._header = True

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
    """State of one learning run; :meth:`run` drives it to the end of the stream."""

    def __init__(self, job: LearnJob, clock: Callable[[], float] = time.perf_counter,
                 wall: Callable[[], float] = time.time, stdout: TextIO | None = None,
                 progress: Callable[[dict], None] | None = None) -> None:
        self.job = job
        self.clock = clock
        self.wall = wall
        self.stdout = stdout or sys.stdout
        self.progress = progress
        self.schema: Schema | None = load_schema(job.schema_path) if job.schema_path else None
        if self.schema is not None and self.schema.target != job.target:
            raise ConfigError(f"the schema's target is {self.schema.target!r} but the "
                              f"target asked for is {job.target!r}")
        self.encoder: Encoder | None = None
        self.task = None
        self.quarantine = _LazyQuarantine(job.quarantine_path or DEFAULT_QUARANTINE)
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
        self.metrics_out = open(job.metrics_path, "w", encoding="utf-8") \
            if job.metrics_path else None
        self.predictions = _PredictionSink(job.predictions_path, self.stdout) \
            if job.predictions_path else None
        self.events_out = open(job.events_path, "w", encoding="utf-8") \
            if job.events_path else None
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
        if self.schema is not None:
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
        """Learn the stream to its end; returns the summary."""
        job = self.job
        warm = self.clock()
        warm_up()
        self.startup_seconds = self.clock() - warm
        self.started = self.clock()
        self.source = open_sources(job.sources, job.fmt, job.batch_rows)
        try:
            pending: list[RawBatch] = []
            for batch in self.source.batches():
                if self.task is None:
                    pending.append(batch)
                    if sum(len(b) for b in pending) < INFER_ROWS:
                        continue
                    self._infer(pending)
                    for held in pending:
                        self._consume(held)
                    pending = []
                    continue
                self._consume(batch)
            if pending:
                self._infer(pending)
                for held in pending:
                    self._consume(held)
        finally:
            self.source.close()
            self._close_outputs()
        self.finished = self.clock()
        if self.snapshots is not None and self.task is not None \
                and self.last_snapshot_records != self.task.records_learned:
            self._snapshot()
        if job.save_path and self.task is not None:
            self.save(job.save_path)
        summary = self.summary()
        if job.summary_path:
            write_atomic(job.summary_path, json.dumps(summary, indent=2,
                                                      default=_json_default) + "\n")
        return summary

    def _infer(self, pending: list[RawBatch]) -> None:
        frames = [b.frame for b in pending if len(b.frame)]
        if not frames:     # nothing but rejects so far: infer from what there is
            frames = [pending[0].frame]
        prefix = pd.concat(frames, ignore_index=True).iloc[:INFER_ROWS]
        self._start(infer_schema(prefix, self.job.target, self.job.task, self.job.declared))

    def _close_outputs(self) -> None:
        self.quarantine.close()
        for out in (self.metrics_out, self.events_out):
            if out is not None:
                out.close()
        if self.predictions is not None:
            self.predictions.close()

    def _consume(self, raw: RawBatch) -> None:
        job = self.job
        batch = self.encoder.encode(raw)
        if batch.rejects and job.strict:
            raise RecordError(_first_reject(batch.rejects).message() +
                              " (strict mode stops here)")
        before = self.quarantine.count
        self.quarantine.write(sorted(batch.rejects, key=lambda r: (r.line, r.field or "")))
        self.records += len(batch) + self.quarantine.count - before
        start = 0
        n = len(batch)
        while start < n:
            stop = min(n, start + self._until_boundary())
            part = slice(start, stop)
            learned_before = self.task.records_learned
            scored = self.task.learn(batch.X[part], batch.y[part], self.encoder)
            self._note_time(batch.times, stop - 1)
            self._write_events(batch, start - learned_before)
            rows = self.task.update_score(batch.y[part], scored, self.encoder)
            if self.predictions is not None:
                self.predictions.write(_slice_batch(batch, part),
                                       self.task.prediction_columns(scored, self.encoder))
            for row in rows:
                self._log(row)
            if self.schedule is not None and self.schedule.due(self.task.records_learned):
                self._snapshot()
            start = stop
        if self.progress is not None:
            self.progress(self._progress_facts())

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
        self.snapshots.write(learned, payload, text, now)
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
        seconds = max(self.finished - self.started, 0.0)
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
            "outputs": {
                "quarantine": self.quarantine.path if self.quarantine.count else None,
                "snapshots": self.job.snapshot_dir if self.snapshots_written else None,
                "metrics": self.job.metrics_path, "events": self.job.events_path,
                "model": self.job.save_path if self.saved else None,
                "predictions": self.job.predictions_path,
            },
        })
        return summary


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
