"""A learning run: source -> encode -> score then learn -> metrics, snapshots, summary.

:class:`LearnJob` says what to read and where outputs go; :func:`run_learn` carries it
out and returns the summary (also written as JSON when asked). The clock is passed in,
so tests can run on a fake one. Each record is scored before it is learned; batches are
cut at metric-log and snapshot boundaries so that every logged value and every snapshot
is taken exactly at its record count, whatever the batch size.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
import time
from datetime import datetime, timezone
from typing import Callable, TextIO

import numpy as np

from connectors.quarantine import QuarantineWriter
from connectors.sources import open_sources

from .atomic import write_atomic
from .classifier import TreeClassifier
from .encoding import EncodedBatch, Encoder
from .errors import ConfigError, RecordError
from .metrics import ClassificationScore
from .rules import (conditions_text, extract_rules, node_conditions, render_text, rule_id,
                    rules_payload)
from .saved_model import save_model
from .schema import Schema, infer_schema, load_schema
from .settings import TreeSettings, require_int
from .snapshots import SnapshotStore

DEFAULT_QUARANTINE = "sapwood-quarantine.jsonl"


@dataclasses.dataclass
class LearnJob:
    """What a learning run reads, how it learns and where its outputs go.

    Paths left as None are not written, except the quarantine: rejected records always
    go to a file (``DEFAULT_QUARANTINE`` unless named), created at the first reject.
    """

    sources: list[str]
    target: str
    fmt: str | None = None
    schema_path: str | None = None
    declared: dict[str, str] = dataclasses.field(default_factory=dict)
    task: str | None = None
    settings: TreeSettings = dataclasses.field(default_factory=TreeSettings)
    summary_path: str | None = None
    save_path: str | None = None
    snapshot_dir: str | None = None
    snapshot_every: int = 0
    snapshot_keep: int | None = None
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
        require_int("metrics interval", self.metrics_every, 1)
        require_int("window", self.window, 1)
        if self.snapshot_every and not self.snapshot_dir:
            raise ConfigError("a snapshot interval needs a snapshot directory")


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

    def write(self, batch: EncodedBatch, labels: list[str], scored, start: int) -> None:
        import pandas as pd

        classes = np.array(labels + [""], dtype=object)
        frame = pd.DataFrame({
            "origin": batch.origin, "line": batch.lines,
            "predicted": classes[scored.pred], "confidence": np.round(scored.confidence, 6),
            "rule": [rule_id(n) for n in scored.leaf],
        })
        if batch.ids is not None:
            frame.insert(2, "id", batch.ids)
        if self.csv:
            self._out.write(frame.to_csv(index=False, header=self._header))
        else:
            self._out.write(frame.to_json(orient="records", lines=True))
            if len(frame) and not frame.empty:
                self._out.write("\n")
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
        self.model: TreeClassifier | None = None
        self.score = ClassificationScore(job.window, job.fading, log_every=job.metrics_every)
        self.quarantine = _LazyQuarantine(job.quarantine_path or DEFAULT_QUARANTINE)
        self.snapshots = SnapshotStore(job.snapshot_dir, keep=job.snapshot_keep) \
            if job.snapshot_dir else None
        self.metrics_out = open(job.metrics_path, "w", encoding="utf-8") \
            if job.metrics_path else None
        self.predictions = _PredictionSink(job.predictions_path, self.stdout) \
            if job.predictions_path else None
        self.events_out = open(job.events_path, "w", encoding="utf-8") \
            if job.events_path else None
        self.recent_events: list[dict] = []
        self.records = 0
        self.last_time: float | None = None
        self.started = 0.0
        self.finished = 0.0
        self.startup_seconds = 0.0
        if self.schema is not None:
            self._start_model(self.schema)

    # ------------------------------------------------------------------ setup
    def _start_model(self, schema: Schema) -> None:
        if schema.task != "classification":
            raise ConfigError(f"target {schema.target!r} looks numeric (task regression); "
                              "only classification is available in this version: declare "
                              "the task as classification if its values are class labels")
        self.schema = schema
        self.encoder = Encoder(schema)
        self.model = TreeClassifier(schema.feature_names, schema.feature_kinds,
                                    self.job.settings)

    # ------------------------------------------------------------------ the run
    def run(self) -> dict:
        """Learn the stream to its end; returns the summary."""
        job = self.job
        warm = self.clock()
        warm_up()
        self.startup_seconds = self.clock() - warm
        self.started = self.clock()
        source = open_sources(job.sources, job.fmt, job.batch_rows)
        try:
            for batch in source.batches():
                if self.model is None:
                    self._start_model(infer_schema(batch.frame, job.target, job.task,
                                                   job.declared))
                self._consume(self.encoder.encode(batch))
                if self.progress is not None:
                    self.progress(self._progress_facts())
        finally:
            source.close()
            self.quarantine.close()
            if self.metrics_out is not None:
                self.metrics_out.close()
            if self.predictions is not None:
                self.predictions.close()
            if self.events_out is not None:
                self.events_out.close()
        self.finished = self.clock()
        if self.snapshots is not None and self.model is not None:
            last = self.snapshots.entries()
            if not last or last[-1]["records"] != self.model.records_learned:
                self._snapshot()
        if job.save_path and self.model is not None:
            self.save(job.save_path)
        summary = self.summary()
        if job.summary_path:
            write_atomic(job.summary_path, json.dumps(summary, indent=2,
                                                      default=_json_default) + "\n")
        return summary

    def _consume(self, batch: EncodedBatch) -> None:
        job = self.job
        if batch.rejects and job.strict:
            raise RecordError(batch.rejects[0].message() + " (strict mode stops here)")
        before = self.quarantine.count
        self.quarantine.write(batch.rejects)
        self.records += len(batch) + self.quarantine.count - before
        start = 0
        n = len(batch)
        while start < n:
            stop = min(n, start + self._until_boundary())
            part = slice(start, stop)
            learned_before = self.model.records_learned
            scored = self.model.learn(batch.X[part], batch.y[part], self.encoder.classes)
            self._note_time(batch.times, stop - 1)
            self._write_events(batch, start - learned_before)
            rows = self.score.update(batch.y[part], scored.pred, len(self.encoder.classes))
            if self.predictions is not None:
                self.predictions.write(_slice_batch(batch, part), self.encoder.classes,
                                       scored, start)
            for row in rows:
                self._log(row)
            if job.snapshot_every and self.model.records_learned % job.snapshot_every == 0:
                self._snapshot()
            start = stop

    def _note_time(self, times: np.ndarray | None, index: int) -> None:
        """Remember the latest record time seen (the data's own clock), if any."""
        if times is not None and index >= 0 and np.isfinite(times[index]):
            self.last_time = float(times[index])

    def _write_events(self, batch: EncodedBatch, offset: int) -> None:
        """Drift events of the last learn call: to the events file and the next snapshot.
        ``offset`` turns a record count into an index of ``batch``."""
        for event in self.model.take_events():
            index = event.record + offset
            when = None
            if batch.times is not None and 0 <= index < len(batch.times) \
                    and np.isfinite(batch.times[index]):
                when = _iso(float(batch.times[index]))
            conditions = node_conditions(self.model, event.node, self.encoder.categories)
            row = {
                "record": event.record + 1, "time": when or _iso(self.wall()),
                "time_source": "data" if when else "clock", "kind": event.kind,
                "node": event.node,
                "alternate": event.other if event.other >= 0 else None,
                "detector": self.job.settings.detector,
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
        learned = self.model.records_learned
        gaps = [self.job.metrics_every - learned % self.job.metrics_every]
        if self.job.snapshot_every:
            gaps.append(self.job.snapshot_every - learned % self.job.snapshot_every)
        return min(gaps)

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
        result = self.score.result(self.encoder.classes if self.encoder else [])
        return {
            "target": self.job.target, "task": "classification",
            "classes": self.encoder.classes if self.encoder else [],
            "records": self.model.records_learned if self.model else 0,
            "accuracy": result["accuracy"],
            "data_time": _iso(self.last_time) if self.last_time is not None else None,
        }

    def rules(self):
        return extract_rules(self.model, self.encoder.categories)

    def _snapshot(self) -> None:
        rules = self.rules()
        header = self.header()
        result = self.score.result(self.encoder.classes)
        payload = rules_payload(rules, {k: v for k, v in header.items() if k != "records"})
        payload["metrics"] = result
        payload["tree"] = self._tree_facts()
        payload["events"] = self.recent_events
        self.recent_events = []
        payload["headline"] = {
            "accuracy": result["accuracy"], "kappa": result["kappa"],
            "window_accuracy": result["window_accuracy"], "rules": len(rules),
            "leaves": self.model.n_leaves, "depth": self.model.depth,
        }
        now = self.wall()
        text = render_text(rules, {**header, "written_at": _iso(now)})
        self.snapshots.write(self.model.records_learned, payload, text, now)

    def _tree_facts(self) -> dict:
        m = self.model
        return {"nodes": m.n_nodes, "leaves": m.n_leaves, "active_leaves": m.n_active_leaves,
                "depth": m.depth, **m.counters()}

    def _progress_facts(self) -> dict:
        elapsed = max(self.clock() - self.started, 1e-9)
        return {"records": self.records, "quarantined": self.quarantine.count,
                "seconds": elapsed, "rate": self.records / elapsed}

    def save(self, path: str) -> None:
        """Write the learner, encoder, schema and metrics to a model file."""
        save_model(path, self.schema, self.encoder, self.model, self.score,
                   {"records": self.records, "quarantined": self.quarantine.count,
                    "target": self.job.target})

    def summary(self) -> dict:
        """The run's summary (the contract other tools rely on, plus details)."""
        seconds = max(self.finished - self.started, 0.0)
        labels = self.encoder.classes if self.encoder else []
        result = self.score.result(labels)
        m = self.model
        drift = m.counters() if m else {}
        summary = {
            "records": self.records,
            "learned": m.records_learned if m else 0,
            "quarantined": self.quarantine.count,
            "task": self.schema.task if self.schema else None,
            "target": self.job.target,
            "accuracy": result["accuracy"], "kappa": result["kappa"],
            "kappa_m": result["kappa_m"], "balanced_accuracy": result["balanced_accuracy"],
            "window_accuracy": result["window_accuracy"],
            "fading_accuracy": result["fading_accuracy"],
            "leaves": m.n_leaves if m else 0, "depth": m.depth if m else 0,
            "drift_alarms": drift.get("drift_alarms", 0),
            "swaps": drift.get("alternates_swapped", 0),
            "alternates_started": drift.get("alternates_started", 0),
            "alternates_dropped": drift.get("alternates_dropped", 0),
            "detector": self.job.settings.detector,
            "seconds": round(seconds, 6),
            "records_per_second": round(self.records / seconds, 1) if seconds > 0 else None,
            "startup_seconds": round(self.startup_seconds, 3),
            "classes": labels,
            "per_class": result["per_class"], "confusion": result["confusion"],
            "tree": self._tree_facts() if m else None,
            "schema": self.schema.to_dict() if self.schema else None,
            "unknown_fields": dict(self.encoder.unknown_fields) if self.encoder else {},
            "sources": list(self.job.sources),
            "outputs": {
                "quarantine": self.quarantine.path if self.quarantine.count else None,
                "snapshots": self.job.snapshot_dir, "metrics": self.job.metrics_path,
                "model": self.job.save_path, "predictions": self.job.predictions_path,
                "events": self.job.events_path,
            },
        }
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
    X = np.array([[0.5, 1.0], [0.25, 0.0], [np.nan, 1.0]])
    y = np.array([0, 1, 0], np.int32)
    for observer in ("gaussian", "histogram"):
        model = TreeClassifier(["a", "b"], ["numeric", "category"],
                               TreeSettings(numeric_observer=observer, grace_period=1))
        scored = model.learn(X, y, ["p", "q"])
        model.predict(X)
    score = ClassificationScore(2, 0.9, log_every=1)
    score.update(y, scored.pred, 2)
    _WARM["done"] = True


def run_learn(job: LearnJob, **kwargs) -> dict:
    """Carry out ``job``; returns the summary. See :class:`LearnRun` for the keywords."""
    return LearnRun(job, **kwargs).run()
