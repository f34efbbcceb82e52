"""Where a learning run's results go: the quarantine, predictions, the metrics log, the
drift events file and rule snapshots.

:class:`RunOutputs` opens them for a :class:`~stream.run.job.LearnJob` (cut back to their
checkpoint lengths when a run resumes), writes to them as batches are learned, tells the
checkpoint how long each appended file is, and closes them.
"""

from __future__ import annotations

import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, TextIO

import numpy as np
import pandas as pd

from connectors.broker_payloads import scheme_of
from connectors.quarantine import QuarantineWriter
from stream.errors import ConfigError, ModelFileError
from stream.rules.concern import concern_order
from stream.rules.rule import rules_payload
from stream.rules.text import conditions_text, render_text
from stream.tree.paths import node_conditions

from .attempts import begin_attempt
from .checkpoint import ResumableOutput, fsync_length, truncate_for_resume
from .prediction_text import csv_text, json_lines_text
from .encoding import EncodedBatch
from .job import DEFAULT_QUARANTINE, LearnJob
from .snapshots import SnapshotSchedule, SnapshotStore


class QuarantineFile:
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


def prediction_frame(batch: EncodedBatch, columns: dict) -> pd.DataFrame:
    """One row per record: where it came from (origin, line, id) and ``columns``."""
    frame = pd.DataFrame({"origin": batch.origin, "line": batch.lines, **columns})
    if batch.ids is not None:
        frame.insert(2, "id", batch.ids)
    return frame


class BrokerPredictions:
    """Per-record predictions published to an MQTT topic or appended to a Redis stream.

    A resumed run publishes again what it predicted after its last checkpoint (at least
    once, never fewer): a broker cannot take back what it was sent.
    """

    file = None

    def __init__(self, spec: str) -> None:
        from connectors.sinks import open_prediction_sink
        self.sink = open_prediction_sink(spec)

    def write(self, batch: EncodedBatch, columns: dict) -> None:
        frame = prediction_frame(batch, columns)
        if len(frame):
            self.sink.write(frame)

    def close(self) -> None:
        self.sink.close()


class PredictionFile:
    """Per-record predictions as JSON lines (or CSV when the name ends in .csv)."""

    def __init__(self, path: str, stdout: TextIO, resume_bytes: int | None = None) -> None:
        self.csv = path.endswith(".csv")
        self.file = None if path == "-" else ResumableOutput(path, resume_bytes,
                                                             "predictions file")
        self._out = stdout if self.file is None else self.file.handle
        self._own = path != "-"
        self._header = not resume_bytes

    def write(self, batch: EncodedBatch, columns: dict) -> None:
        frame = prediction_frame(batch, columns)
        if not len(frame):
            return
        if self.csv:
            text = csv_text(frame, self._header)
            self._out.write(text if text is not None
                            else frame.to_csv(index=False, header=self._header))
        else:
            text = json_lines_text(frame)
            if text is None:
                text = frame.to_json(orient="records", lines=True)
            self._out.write(text if text.endswith("\n") else text + "\n")
        self._header = False
        self._out.flush()

    def close(self) -> None:
        if self._own:
            self._out.close()


def open_predictions(spec: str, stdout: TextIO, resume_bytes: int | None):
    """A broker sink when ``spec`` is an ``mqtt[s]://`` or ``redis[s]://`` URL, else a file
    (``-`` for standard output)."""
    if scheme_of(spec) in ("mqtt", "mqtts", "redis", "rediss"):
        return BrokerPredictions(spec)
    return PredictionFile(spec, stdout, resume_bytes)


def json_default(value):
    """``json.dumps`` default: numpy numbers as Python numbers, non-finite as null."""
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return None if not math.isfinite(value) else float(value)
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def iso(seconds: float) -> str:
    """Epoch seconds as an ISO-8601 UTC time to the second (``...Z``)."""
    return datetime.fromtimestamp(seconds, tz=timezone.utc).isoformat(timespec="seconds") \
        .replace("+00:00", "Z")


def slice_batch(batch: EncodedBatch, part: slice) -> EncodedBatch:
    """Records ``part`` of ``batch`` (its rejects stay behind)."""
    return EncodedBatch(batch.X[part], batch.y[part], batch.lines[part], batch.origin,
                        None if batch.times is None else batch.times[part],
                        None if batch.ids is None else batch.ids[part], [])


class RunOutputs:
    """The files and sinks of one run, opened for ``job``.

    ``resumed`` maps an appended output's name (``metrics``, ``events``, ``predictions``,
    ``quarantine``) to its length at the checkpoint a run resumes from (None: a fresh run).
    ``wall`` dates snapshots and events of records without a time.
    """

    def __init__(self, job: LearnJob, stdout: TextIO, clock: Callable[[], float],
                 wall: Callable[[], float], resumed: dict[str, Any] | None) -> None:
        self.job = job
        self.wall = wall

        def resume_bytes(name: str) -> int | None:
            return resumed[name]["bytes"] if resumed and name in resumed else None

        self.quarantine = QuarantineFile(job.quarantine_path or DEFAULT_QUARANTINE)
        if resumed is not None:
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
            if job.checkpoint_path:
                begin_attempt(job.snapshot_dir, job.checkpoint_path, fresh=resumed is None)
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
        self.predictions = open_predictions(job.predictions_path, stdout,
                                            resume_bytes("predictions")) \
            if job.predictions_path else None
        if self.predictions is not None and self.predictions.file is not None:
            self.appended["predictions"] = self.predictions.file
        self.recent_events: list[dict] = []
        self.snapshots_written = 0
        self.last_snapshot_records: int | None = None
        self.snapshot_sequence = _highest_snapshot(self.snapshots) \
            if self.snapshots is not None else 0

    # ------------------------------------------------------------------ writing
    def write_predictions(self, batch: EncodedBatch, part: slice, columns: dict) -> None:
        """The predictions of ``batch[part]``, when predictions are asked for."""
        if self.predictions is not None:
            self.predictions.write(slice_batch(batch, part), columns)

    def log_metrics(self, row: dict, model, last_time: float | None) -> None:
        """One row of the metrics log, with the tree's size and the data time."""
        if self.metrics_out is None:
            return
        row = dict(row)
        row["leaves"] = model.n_leaves
        row["depth"] = model.depth
        row["time"] = iso(last_time) if last_time is not None else None
        self.metrics_out.write(json.dumps(row, default=json_default) + "\n")
        self.metrics_out.flush()

    def write_events(self, events, batch: EncodedBatch, offset: int, model, categories: dict,
                     detector: str) -> list[dict]:
        """Drift events of the last learn call: to the events file and the next snapshot;
        returns them as written. ``offset`` turns a record count into an index of
        ``batch``."""
        rows = []
        for event in events:
            index = event.record + offset
            when = None
            if batch.times is not None and 0 <= index < len(batch.times) \
                    and np.isfinite(batch.times[index]):
                when = iso(float(batch.times[index]))
            conditions = event.path if getattr(event, "path", None) is not None else \
                node_conditions(model, event.node, categories)
            row = {
                "record": event.record + 1, "time": when or iso(self.wall()),
                "time_source": "data" if when else "clock", "kind": event.kind,
                "node": event.node,
                "alternate": event.other if event.other >= 0 else None,
                "detector": detector,
                "error_before": round(event.before, 6), "error_after": round(event.after, 6),
                "where": conditions_text(conditions),
                "path": [c.to_dict() for c in conditions],
            }
            self.recent_events.append(row)
            rows.append(row)
            if self.events_out is not None:
                self.events_out.write(json.dumps(row) + "\n")
        if self.events_out is not None:
            self.events_out.flush()
        return rows

    def snapshot_due(self, learned: int) -> bool:
        return self.schedule is not None and self.schedule.due(learned)

    def records_to_boundary(self, learned: int) -> int:
        """Records until the next snapshot boundary (0: none by records)."""
        return self.schedule.records_to_boundary(learned) if self.schedule is not None else 0

    def write_snapshot(self, rules, header: dict, result: dict, headline: dict,
                       tree_facts: dict, learned: int) -> None:
        """Rules and facts as a snapshot (JSON plus text) taken at ``learned`` records,
        the rules predicting the class of concern first."""
        rules = concern_order(rules, header.get("concern"))
        payload = rules_payload(rules, {k: v for k, v in header.items() if k != "records"})
        payload["metrics"] = result
        payload["tree"] = tree_facts
        payload["events"] = self.recent_events
        payload["headline"] = headline
        self.recent_events = []
        now = self.wall()
        text = render_text(rules, {**header, "written_at": iso(now)})
        entry = self.snapshots.write(learned, payload, text, now)
        self.snapshot_sequence = entry["sequence"]
        if self.schedule is not None:
            self.schedule.taken(learned)
        self.snapshots_written += 1
        self.last_snapshot_records = learned

    # ------------------------------------------------------------------ checkpoints
    def lengths(self) -> dict[str, dict]:
        """Durable length of every appended output, for the checkpoint."""
        outputs = {name: {"path": out.path, "bytes": out.durable_length()}
                   for name, out in self.appended.items()}
        qpath = self.quarantine.path  # the writer flushes after every batch
        outputs["quarantine"] = {"path": qpath, "bytes": fsync_length(qpath)
                                 if os.path.exists(qpath) else None}
        return outputs

    def state(self, now: float) -> dict:
        """Snapshot counters and the events not yet in a snapshot, for the checkpoint."""
        schedule = None
        if self.schedule is not None:
            schedule = {"last_records": self.schedule.last_records,
                        "seconds_since": max(now - self.schedule.last_time, 0.0)}
        return {"quarantined": self.quarantine.count,
                "snapshots_written": self.snapshots_written,
                "last_snapshot_records": self.last_snapshot_records,
                "snapshot_sequence": self.snapshot_sequence,
                "schedule": schedule, "recent_events": self.recent_events}

    def restore(self, run: dict, now: float) -> None:
        """Take up the counters :meth:`state` wrote; later snapshots are removed by the
        caller (:func:`stream.run.checkpoint.rollback_snapshots`)."""
        self.quarantine.count = int(run["quarantined"])
        self.snapshots_written = int(run["snapshots_written"])
        self.last_snapshot_records = run["last_snapshot_records"]
        self.recent_events = list(run["recent_events"])
        self.snapshot_sequence = int(run["snapshot_sequence"])
        if self.schedule is not None and run.get("schedule"):
            self.schedule.last_records = int(run["schedule"]["last_records"])
            self.schedule.last_time = now - float(run["schedule"]["seconds_since"])

    def close(self) -> None:
        """Close every output file; safe to call twice."""
        self.quarantine.close()
        for out in (self.metrics_out, self.events_out):
            if out is not None:
                out.close()
        if self.predictions is not None:
            self.predictions.close()


def _highest_snapshot(store: SnapshotStore) -> int:
    """The highest snapshot number in a store's directory (0 for none or unreadable)."""
    try:
        return max((e["sequence"] for e in store.entries()), default=0)
    except (ModelFileError, OSError):
        return 0
