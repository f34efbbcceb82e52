"""A learning run: source -> encode -> score then learn -> metrics, snapshots, summary.

:class:`LearnRun` carries out a :class:`~stream.run.job.LearnJob` and returns the summary
(also written as JSON when asked); :func:`run_learn` is the one-call form. The clock is
passed in, so tests can run on a fake one. Each record is scored before it is learned;
batches are cut at metric-log and snapshot boundaries so that every logged value and
every snapshot is taken exactly at its record count, whatever the batch size. The
schema, when not declared, is inferred from the first ``INFER_ROWS`` records, whatever
the batch size (in follow mode from fewer if the file holds fewer when the reader first
catches up).

The run delegates by concern: where records come from (:mod:`stream.run.reading`), where
results go (:mod:`stream.run.outputs`), checkpoint and resume (:mod:`stream.run.resume`)
and the summary (:mod:`stream.run.summary`). Checkpoints are written between fully
learned batches; only after one is durable is the source told to ``commit`` it (a broker
acknowledges then). A run whose checkpoint exists resumes from it: state restored,
outputs cut back to their lengths at the checkpoint, later snapshots removed, the source
sought to the position. Results then equal an uninterrupted run's.

SIGINT and SIGTERM (when checkpointing or following): the batch being learned is
finished, a checkpoint written, the summary written, and the run returns normally (the
CLI exits 0). A second signal interrupts at once.
"""

from __future__ import annotations

import functools
import json
import signal
import sys
import threading
import time
from typing import Callable, TextIO

import numpy as np

from connectors.base import RawBatch
from connectors.delimited import warm_up as warm_reader
from connectors.follow import FollowControl, FollowStopped
from stream.errors import (
    ConfigError,
    InputError,
    OutputError,
    RecordError,
    SapwoodError,
    SchemaError,
    SupersededError,
)

from .atomic import write_atomic
from .encoding import EncodedBatch, Encoder, PreparedColumns, prepare_columns
from .job import LearnJob
from .notices import FieldNotices
from .outputs import RunOutputs, iso, json_default
from .read_ahead import ReadAhead
from .reading import held_enough, infer_run_schema, open_run_source
from .resume import RunCheckpoint
from .saved_model import save_model
from .schema import Schema, load_schema, not_a_field
from .stopping import StopsOnSignal
from .summary import rules_header, run_summary, tree_facts
from .tasks import TASKS, warm_up


LIVE_INFER_SECONDS = 5.0
"""A live feed's records held back for schema inference at most this long (then the
schema is inferred from what came), unless ``INFER_ROWS`` records come first."""


class LearnRun(StopsOnSignal):
    """State of one learning run; :meth:`run` drives it to the end of the stream.

    ``warn`` receives messages for the operator (a damaged checkpoint fallen back from);
    stderr by default.
    """

    def __init__(self, job: LearnJob, clock: Callable[[], float] = time.perf_counter,
                 wall: Callable[[], float] = time.time, stdout: TextIO | None = None,
                 progress: Callable[[dict], None] | None = None,
                 warn: Callable[[str], None] | None = None,
                 schema: Schema | None = None) -> None:
        self.job = job
        self.clock = clock
        self.wall = wall
        self.progress = progress
        # a fenced source's check (connectors.fencing): before each batch's outputs
        self._fence_check: Callable[[], None] | None = None
        self.warn = warn or (lambda text: print(f"sapwood: warning: {text}",
                                                file=sys.stderr, flush=True))
        self.schema: Schema | None = schema if schema is not None else \
            load_schema(job.schema_path) if job.schema_path else None
        if self.schema is not None and self.schema.target != job.target:
            raise ConfigError(f"the schema's target is {self.schema.target!r} but the "
                              f"target asked for is {job.target!r}")
        self.encoder: Encoder | None = None
        self.task = None
        self.stop = threading.Event()
        self.stopped: str | None = None
        self.position: dict | None = None
        self.records = 0            # records read: learned, waiting or quarantined
        self.records_seen = 0       # ``records`` when the last batch was accounted for
        self.notices = FieldNotices(self.warn)
        self.last_time: float | None = None
        self.prior_seconds = 0.0
        self.resumes = 0
        self.resumed_at: int | None = None
        self.saved = False
        self.started = self.finished = self.startup_seconds = 0.0
        self.last_batch_at: float | None = None   # when the last records were accounted for
        self.source = None
        self.alerts = None
        if job.alerts_path:
            from .alerts import RunAlerts

            self.alerts = RunAlerts(job, self.warn)
        self.checkpoint = RunCheckpoint(job, self.warn) if job.checkpoint_path else None
        resumed = self.checkpoint.resumed_outputs() if self.checkpoint else None
        self.outputs = RunOutputs(job, stdout or sys.stdout, clock, wall, resumed)
        self.delayed = None
        if job.labels:
            from .delayed_labels import DelayedLabels

            self.delayed = DelayedLabels(self)
        if resumed is not None:
            self.checkpoint.restore(self)
            self.records_seen = self.records
        elif self.schema is not None:
            self._start(self.schema)

    # ------------------------------------------------------------------ setup
    def _start(self, schema: Schema) -> None:
        job = self.job
        self.schema = schema
        self.encoder = Encoder(schema, job.category_cap, job.class_cap)
        settings = job.learner_settings(schema.task)
        job.check_concern(schema.task)
        self.task = TASKS[schema.task].create(schema, settings, job.window, job.fading,
                                              job.metrics_every, concern=job.concern)

    @property
    def model(self):
        """The learner (a TreeClassifier or TreeRegressor), None before the schema."""
        return self.task.model if self.task is not None else None

    @property
    def quarantine(self):
        """Where rejected records go (:class:`~stream.run.outputs.QuarantineFile`)."""
        return self.outputs.quarantine

    # ------------------------------------------------------------------ the run
    def run(self) -> dict:
        """Learn the stream to its end (or until stopped); returns the summary."""
        job = self.job
        warm = self.clock()
        warm_up()
        warm_reader()
        self.startup_seconds = self.clock() - warm
        self.started = self.clock()
        if self.checkpoint is not None:
            self.checkpoint.last_at = self.started
        follow = FollowControl(job.poll_seconds, job.idle_exit, self.stop,
                               on_idle=self._on_idle) if job.follow else None
        self.source = open_run_source(job, follow, self.checkpoint.resumed_position()
                                      if self.checkpoint else None)
        if hasattr(self.source, "on_quiet"):   # a live broker feed
            self.source.on_quiet = self._on_quiet
        self._fence_check = getattr(self.source, "fence_check", None)
        if self.checkpoint is not None:
            self.checkpoint.guard = self._fence_check
        if self.delayed is not None:
            from .reading import batch_rows_for

            self.delayed.open(batch_rows_for(job))
        self._pending: list[RawBatch] = []
        self._first_unread = None     # the first reject read before any schema
        handlers = self._catch_signals() if job.checkpoint_path or job.follow else {}
        failures: list[str] = []
        unreadable: InputError | None = None
        try:
            try:
                self._read_all()
            except FollowStopped as exc:
                self.stopped = self.stopped or exc.reason
            except InputError as exc:     # e.g. a truncated .gz: keep what was learned
                if self.task is None or self.task.records_learned == 0:
                    raise
                unreadable = exc
            if self.stopped is None and self.delayed is not None:
                self.delayed.finish()
                if self.checkpoint is None:
                    self.delayed.commit()   # nothing durable to wait for
            self.finished = self.clock()
            if self._live() and self.delayed is None and self.last_batch_at is not None:
                # a live feed ends after a quiet spell (or on a stop): its time ends with
                # the last batch learned, so records_per_second is the rate of learning
                self.finished = self.last_batch_at
            self._check_target_of_empty_input()
            if self.task is None and self._first_unread is not None:
                self.warn(f"no record could be learned: all {self.records:,} records read "
                          f"went to the quarantine {self.outputs.quarantine.path!r} "
                          f"(the first: {self._first_unread.message()}); no schema was "
                          f"inferred and no model written")
            failures += self._conclude()
        finally:
            for signum, handler in handlers.items():
                signal.signal(signum, handler)
            self._close()
        return self._report(failures, unreadable)

    def _conclude(self) -> list[str]:
        """The last snapshot, alert check and checkpoint of a run that reached its end
        (or a stop); returns what could not be written."""
        failures: list[str] = []
        if self.stopped is None and self.outputs.snapshots is not None \
                and self.task is not None \
                and self.outputs.last_snapshot_records != self.task.records_learned:
            self._snapshot()
        if self.alerts is not None and self.task is not None \
                and self.alerts.watch.checked_at != self.task.records_learned:
            self._check_alerts()
        if self.checkpoint is not None and self.task is not None:
            failures += self._attempt("checkpoint", self.job.checkpoint_path,
                                      lambda: self.checkpoint.write(self))
        if self.alerts is not None:
            self.alerts.finish(self.checkpoint is not None and self.task is not None)
        return failures

    def _close(self) -> None:
        """Close the source, label feed, alert sink and outputs."""
        self.source.close()
        if self.delayed is not None:
            self.delayed.close()
        if self.alerts is not None:
            self.alerts.close()
        self.outputs.close()

    def _report(self, failures: list[str], unreadable: InputError | None = None) -> dict:
        """Save the model, write the summary; raise what went wrong after that."""
        job = self.job
        if job.save_path and self.task is not None:
            failures += self._attempt("model", job.save_path,
                                      lambda: self.save(job.save_path))
        summary = self.summary()
        if unreadable is not None:
            summary["stopped"] = "input error"
            failures.insert(0, str(unreadable))
        if failures:
            summary["failures"] = failures
        if job.summary_path:
            write_atomic(job.summary_path, json.dumps(summary, indent=2,
                                                      default=json_default) + "\n")
        if unreadable is not None:
            unreadable.summary = summary
            raise unreadable
        if failures:
            raise OutputError("; ".join(failures), summary)
        return summary

    # ------------------------------------------------------------------ fed by a caller
    def open_fed(self) -> None:
        """Ready the run to be handed batches (:meth:`feed`) by a caller that reads the
        source itself (a keyed run hands each key's records to that key's run). The
        schema must be known (given, or restored from a checkpoint)."""
        if self.task is None:
            raise ConfigError("a run fed by a caller needs its schema up front")
        self.started = self.clock()
        if self.checkpoint is not None:
            self.checkpoint.last_at = self.started
        self.source = _Fed()
        self._pending = []
        self._first_unread = None

    def feed(self, batch: RawBatch, prepared: PreparedColumns | None = None) -> None:
        """Score then learn the records of ``batch`` (fed mode); ``prepared``: its
        columns already read."""
        self._consume(batch, prepared)
        self._after_batch(batch)

    def finish_fed(self) -> dict:
        """End a fed run: last snapshot, checkpoint, model and summary; returns the
        summary."""
        self.finished = self.clock()
        try:
            failures = self._conclude()
        finally:
            self._close()
        return self._report(failures)

    def close_fed(self) -> None:
        """Close a fed run's outputs without concluding it (it is taken up again later
        from its checkpoint)."""
        self._close()

    @staticmethod
    def _attempt(what: str, path: str, write) -> list[str]:
        """Run ``write``; a failure becomes a message instead of losing the summary."""
        try:
            write()
        except SupersededError:
            raise                       # a later learner owns the outputs: write nothing
        except (OSError, ValueError, SapwoodError) as exc:  # UnicodeError is a ValueError
            return [f"could not write the {what} {path!r}: {exc}"]
        return []

    def _read_all(self) -> None:
        """Every batch of the source, through schema inference, learning and checkpoints.
        Files and pipes are read one batch ahead on a thread of their own."""
        self._pending = []
        ahead = None if self._live() else ReadAhead(self.source.batches())
        if self.schema is not None:   # declared or resumed
            self._tell_readers(ahead)
        pairs = ((batch, None) for batch in self.source.batches()) if ahead is None else ahead
        held_since = None
        try:
            for batch, prepared in pairs:
                if self.task is None:
                    self._pending.append(batch)
                    held_since = held_since if held_since is not None else self.clock()
                    # a live feed that never falls quiet is not held back for long either
                    if held_enough(self._pending) or (
                            ahead is None and self.clock() - held_since >= LIVE_INFER_SECONDS):
                        self._learn_pending(ahead)
                else:
                    self._consume(batch, prepared)
                    self._after_batch(batch)
                if self.stop.is_set():
                    break
        finally:
            if ahead is not None:
                ahead.close()
            # read but not yet learned (a stop, the end or an unreadable rest came
            # during inference)
            if self._pending and sys.exc_info()[0] in (None, FollowStopped, InputError):
                self._learn_pending()

    def _tell_readers(self, ahead: ReadAhead | None) -> None:
        """The schema is settled: the source's readers learn which columns are labels,
        and ``ahead`` (if reading ahead) reads the columns of each batch it reads."""
        hints = getattr(self.source, "hints", None)
        if hints is not None:
            hints.labels = frozenset(self.schema.label_columns())
        if ahead is not None:
            ahead.prepare_with(functools.partial(prepare_columns, self.schema,
                                                 scoring=self.delayed is not None))

    def _live(self) -> bool:
        """Whether the source waits for more records (a followed file, a broker)."""
        return self.job.follow or hasattr(self.source, "on_quiet")

    def _learn_pending(self, ahead: ReadAhead | None = None) -> None:
        """Infer the schema from the batches held back, then learn them (see
        :meth:`_tell_readers` for ``ahead``)."""
        pending, self._pending = self._pending, []
        if not any(len(b.frame) for b in pending) and any(b.rejects for b in pending):
            self._quarantine_unread(pending)   # no record to infer from yet: wait for one
            return
        self._start(infer_run_schema(pending, self.job, self.delayed is not None))
        self._tell_readers(ahead)
        for held in pending:
            self._consume(held)
            self._after_batch(held)

    def _quarantine_unread(self, pending: list[RawBatch]) -> None:
        """Records that could not be split into fields, read before any schema: they go
        to the quarantine (or stop a strict run) and count as read."""
        rejects = sorted((r for b in pending for r in b.rejects),
                         key=lambda r: (r.line, r.field or ""))
        if self.job.strict:
            raise RecordError(rejects[0].message() + " (strict mode stops here)")
        before = self.outputs.quarantine.count
        self.outputs.quarantine.write(rejects)
        self.records += self.outputs.quarantine.count - before   # records, not values
        if self._first_unread is None:
            self._first_unread = rejects[0]

    def _on_idle(self) -> None:
        """A followed file has no new line for now (called from inside the source's
        iteration, between two batches): a slow feed is not held back until
        ``INFER_ROWS`` records have come, and a checkpoint due by time is written."""
        if self.task is None:
            if self._pending:
                self._learn_pending()
            return
        if self.checkpoint is not None and self.checkpoint.due_while_idle(self.clock()):
            self.checkpoint.write(self)

    def _check_target_of_empty_input(self) -> None:
        """A header with no record under it still names the fields: an unknown target
        is the same error as with records, not an empty success."""
        columns = getattr(self.source, "header_columns", None)
        if self.task is None and columns and self.job.target not in columns:
            raise SchemaError(not_a_field("target", self.job.target, columns))

    def _on_quiet(self) -> None:
        """A broker feed waited and nothing came: do what an idle followed file does,
        and end the reading if a stop was asked for (a caught-up feed would otherwise
        honour a signal only when the next record arrives)."""
        self._on_idle()
        if self.stop.is_set():
            raise FollowStopped("stop")

    def _after_batch(self, batch: RawBatch) -> None:
        """Remember where the source stands; checkpoint or acknowledge when due."""
        if batch.position is not None:
            self.position = batch.position
        grown = self.records - self.records_seen
        self.records_seen = self.records
        if grown:
            self.last_batch_at = self.clock()
        if self.checkpoint is None:
            if self.position is not None and hasattr(self.source, "commit"):
                self.source.commit(self.position)  # nothing durable to wait for
            if self.delayed is not None:
                self.delayed.commit()
            return
        self.checkpoint.grown(grown)
        if self.checkpoint.due(self.records, self.clock(),
                               getattr(self.source, "max_uncommitted", None)):
            self.checkpoint.write(self)

    def _consume(self, raw: RawBatch, prepared: PreparedColumns | None = None) -> None:
        if self._fence_check is not None:
            self._fence_check()     # superseded: write no output of this batch
        batch = self.encode(raw, labels_optional=self.delayed is not None, prepared=prepared)
        if self.delayed is not None:
            self.delayed.consume(batch)
        else:
            self.learn_stretch(batch)
        if self.progress is not None:
            self.progress(self._progress_facts())

    # ------------------------------------------------------------------ learning
    def encode(self, raw: RawBatch, labels_optional: bool = False, count: bool = True,
               prepared: PreparedColumns | None = None) -> EncodedBatch:
        """Encode a raw batch; rejects go to quarantine (or stop a strict run).
        ``labels_optional`` keeps records without a target (delayed labels); ``prepared``:
        its columns already read on the reading thread."""
        batch = self.encoder.encode(raw, scoring=labels_optional, prepared=prepared)
        if batch.rejects and self.job.strict:
            first = min(batch.rejects, key=lambda r: (r.line, r.field or ""))
            raise RecordError(first.message() + " (strict mode stops here)")
        quarantine = self.outputs.quarantine
        before = quarantine.count
        self.notices.note(batch.rejects, self.encoder)
        quarantine.write(sorted(batch.rejects, key=lambda r: (r.line, r.field or "")))
        if count:
            self.records += len(batch) + quarantine.count - before
        return batch

    def emit_predictions(self, batch: EncodedBatch, part: slice, scored) -> None:
        """Write the predictions of ``batch[part]`` (delayed labels: at arrival)."""
        if self.outputs.predictions is not None:
            self.outputs.write_predictions(batch, part,
                                           self.task.prediction_columns(scored, self.encoder))

    def learn_stretch(self, batch: EncodedBatch, arrival=None) -> None:
        """Score then learn every record of ``batch`` (all labelled), in order.

        Batches are cut at metric-log and snapshot boundaries. ``arrival``: the
        predictions made when the records arrived (delayed labels), scored instead of
        the learner's own; predictions are then not written again.
        """
        start = 0
        n = len(batch)
        task, outputs = self.task, self.outputs
        while start < n:
            stop = min(n, start + self._until_boundary())
            part = slice(start, stop)
            learned_before = task.records_learned
            scored = task.learn(batch.X[part], batch.y[part], self.encoder)
            self._note_time(batch.times, stop - 1)
            rows = outputs.write_events(task.take_events(), batch, start - learned_before,
                                        self.model, self.encoder.categories,
                                        task.settings.detector)
            if self.alerts is not None:
                self.alerts.note(rows)
            judged = scored if arrival is None else arrival.part(part)
            rows = task.update_score(batch.y[part], judged, self.encoder, self.job.concern)
            if arrival is None:
                self.emit_predictions(batch, part, scored)
            for row in rows:
                outputs.log_metrics(row, self.model, self.last_time)
            if outputs.snapshot_due(task.records_learned):
                self._snapshot()
            if self.alerts is not None and self.alerts.due(task.records_learned):
                self._check_alerts()
            start = stop

    def _note_time(self, times: np.ndarray | None, index: int) -> None:
        """Remember the latest record time seen (the data's own clock), if any."""
        if times is not None and index >= 0 and np.isfinite(times[index]):
            self.last_time = float(times[index])

    def _until_boundary(self) -> int:
        """Records to learn before the next metrics-log row or snapshot. A metrics row
        holds the tree's size then, so the learning is cut there; without a metrics log
        the scores' rows need no cut (the scoring pass makes them at any batch size)."""
        learned = self.task.records_learned
        gap = self.job.metrics_every - learned % self.job.metrics_every \
            if self.outputs.metrics_out is not None else 1 << 62
        to_snapshot = self.outputs.records_to_boundary(learned)
        if self.alerts is not None:
            gap = min(gap, self.alerts.records_to_boundary(learned))
        return min(gap, to_snapshot) if to_snapshot else gap

    # ------------------------------------------------------------------ results
    def header(self) -> dict:
        """Facts that head a rule listing or snapshot."""
        return rules_header(self)

    def rules(self):
        return self.task.rules(self.encoder.categories)

    def _snapshot(self) -> None:
        rules = self.rules()
        header = self.header()
        result = self.task.result(self.encoder)
        m = self.model
        headline = {**self.task.headline(result), "rules": len(rules),
                    "leaves": m.n_leaves, "depth": m.depth}
        self.outputs.write_snapshot(rules, header, result, headline, tree_facts(m),
                                    self.task.records_learned)

    def _check_alerts(self) -> None:
        header = self.header()
        when = header.get("data_time") or iso(self.wall())
        self.alerts.check(self.rules(), header, self.task.records_learned, when,
                          self.encoder.ranges)

    def _progress_facts(self) -> dict:
        elapsed = max(self.clock() - self.started, 1e-9)
        facts = {"records": self.records, "quarantined": self.outputs.quarantine.count,
                 "seconds": elapsed, "rate": self.records / elapsed}
        bytes_read = getattr(self.source, "bytes_read", None)
        if callable(bytes_read):
            facts["bytes_read"] = bytes_read()
        return facts

    def save(self, path: str) -> None:
        """Write the learner, encoder, schema and metrics to a model file."""
        save_model(path, self.schema, self.encoder, self.task, {
            "records": self.records, "quarantined": self.outputs.quarantine.count,
            "target": self.job.target, "concern": self.job.concern})
        self.saved = True

    def summary(self) -> dict:
        """The run's summary (the contract other tools rely on, plus details)."""
        return run_summary(self)


class _Fed:
    """The source of a fed run: batches come from the caller."""

    def close(self) -> None:
        pass


def run_learn(job: LearnJob, **kwargs) -> dict:
    """Carry out ``job``; returns the summary. See :class:`LearnRun` for the keywords."""
    return LearnRun(job, **kwargs).run()
