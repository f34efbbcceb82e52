"""A keyed run: one tree per value of a field (a line, a site, an asset family), learned
from one stream in one process.

:class:`KeyedRun` reads the job's sources once, infers one schema from the first
``INFER_ROWS`` records (the key field is left out of the features), splits every batch
by the key's value and hands each key's records, in record order, to that key's own
:class:`~stream.run.engine.LearnRun` (fed mode). Each key's run is exactly the run a
single-tree ``sapwood learn`` would make of that key's records with the same schema: its
outputs are the job's outputs with a folder per key inserted (``rules/`` becomes
``rules/<key>/``, ``out/metrics.jsonl`` becomes ``out/<key>/metrics.jsonl``), and every
folder that holds key folders gets ``keys.json`` (the index of keys) and ``schema.json``.

Records are read into a window of up to ``WINDOW_RECORDS`` (a live feed: one batch), then
split by key in one pass, so each key's tree is called with all its records of the window
at once; results do not depend on the window (nor on batch size). At most
``job.keys_in_memory`` keys are held in memory: the least recently seen key is written to
a state file (the single run's checkpoint format) and reloaded when its key returns.
Without ``--checkpoint`` those files live in a temporary folder.

Checkpoint (``job.checkpoint_path`` names a folder): every key's state file
(``<key>.state-<n>.ckpt``, numbered so a newer state never overwrites the one the last
checkpoint names) and ``keyed-checkpoint.json``: the source position, the counters and,
per key, which state file belongs to it. That file is written atomically after the state
files, and only then is the source told to commit; a rerun of the same command resumes
from it (state files and outputs written after it are cut back), so a killed keyed run
ends like an uninterrupted one.

Not supported with a key (refused with a message): delayed labels, alerts, predictions to
standard output or to a broker.
"""

from __future__ import annotations

import collections
import copy
import dataclasses
import hashlib
import json
import os
import re
import shutil
import signal
import sys
import tempfile
import threading
import time
from typing import Callable

import numpy as np
import pandas as pd

from connectors.base import RawBatch, Reject
from connectors.follow import FollowControl, FollowStopped
from stream.errors import ConfigError, ModelFileError, OutputError, RecordError

from .atomic import write_atomic
from .checkpoint import (
    check_fingerprint,
    fsync_length,
    iso_now,
    job_fingerprint,
    json_ready,
    rollback_snapshots,
    truncate_for_resume,
)
from .encoding import prepare_columns
from .engine import LIVE_INFER_SECONDS, LearnRun
from .resume import RunCheckpoint
from .job import LearnJob
from .outputs import DEFAULT_QUARANTINE, QuarantineFile, json_default
from .reading import held_enough, infer_run_schema, open_run_source
from .schema import Schema, load_schema, not_a_field
from .stopping import StopsOnSignal
from .tasks import warm_up
from .values import MISSING_MARKERS, missing_mask

WINDOW_RECORDS = 1 << 20
"""Records read before they are split by key and learned (fewer at a checkpoint, at a
change of source file, and for a live feed after every batch)."""
INDEX_NAME = "keys.json"
SCHEMA_NAME = "schema.json"
MANIFEST_NAME = "keyed-checkpoint.json"
MANIFEST_VERSION = 1
_RESERVED = {INDEX_NAME, SCHEMA_NAME, MANIFEST_NAME, "index.json", "", ".", ".."}


def key_folder(key: str) -> str:
    """The folder name of ``key``: the key itself when it is a plain name (letters,
    digits, ``.``, ``_``, ``-``; at most 64 characters), else a cleaned form with a short
    hash of the key, so two keys never share a folder."""
    plain = re.sub(r"[^A-Za-z0-9._-]", "_", key)[:48].strip(".")
    if plain == key and len(key) <= 64 and key not in _RESERVED:
        return key
    digest = hashlib.sha1(key.encode("utf-8", "surrogatepass")).hexdigest()[:10]
    return f"{plain or 'key'}-{digest}"


def keyed_path(path: str | None, folder: str, directory: bool = False) -> str | None:
    """``path`` of one key: a directory gets the key folder inside, a file the key folder
    before its name."""
    if path is None:
        return None
    if directory:
        return os.path.join(path, folder)
    head, name = os.path.split(path)
    return os.path.join(head, folder, name)


def key_text(values: pd.Series) -> pd.Series:
    """Key values as text: what the file holds; whole floats (JSON numbers) without
    their ``.0``."""
    if values.dtype.kind == "f":
        whole = np.isfinite(values) & (values == np.round(values))
        text = values.astype(str)
        return text.where(~whole, values.round().astype("int64", errors="ignore").astype(str))
    return values.astype(str)


def check_keyed_job(job: LearnJob) -> None:
    """What a keyed run cannot do, refused before anything is read."""
    field = job.by
    if not field or field == job.target:
        raise ConfigError(f"--by must name a field other than the target, got {field!r}")
    if job.labels:
        raise ConfigError("--by does not work with --labels yet (labels that come later "
                          "are joined per run, not per key)")
    if job.alerts_path:
        raise ConfigError("--by does not work with --alerts yet (alerts follow one tree)")
    spec = job.predictions_path
    if spec is not None and (spec == "-" or "://" in spec):
        raise ConfigError("with --by, --predictions must be a file (a folder per key "
                          f"holds each key's predictions), got {spec!r}")
    if job.checkpoint_path and os.path.isfile(job.checkpoint_path):
        raise ConfigError(f"with --by, --checkpoint names a folder (a state file per key), "
                          f"but {job.checkpoint_path!r} is a file")
    kind = job.declared.get(field)
    if kind not in (None, "ignore"):
        raise ConfigError(f"the key field {field!r} is declared {kind!r}; a key field "
                          "is not a feature of the trees")


@dataclasses.dataclass
class KeyState:
    """One key: its folder, its run while in memory, the records waiting for it, and the
    state files written for it (``gen``: the newest, ``saved_gen``: the one the last
    checkpoint names; 0 for none)."""

    key: str
    folder: str
    run: LearnRun | None = None
    gen: int = 0
    saved_gen: int = 0
    dirty: bool = False
    summary: dict | None = None


class KeyedRun(StopsOnSignal):
    """A run that learns one tree per value of ``job.by``; :meth:`run` returns the
    summary (per-key summaries go to each key's folder)."""

    def __init__(self, job: LearnJob, clock: Callable[[], float] = time.perf_counter,
                 wall: Callable[[], float] = time.time,
                 progress: Callable[[dict], None] | None = None,
                 warn: Callable[[str], None] | None = None) -> None:
        check_keyed_job(job)
        self.job = job
        self.clock, self.wall, self.progress = clock, wall, progress
        self.warn = warn or (lambda text: print(f"sapwood: warning: {text}",
                                                file=sys.stderr, flush=True))
        self.keys: dict[str, KeyState] = {}
        self._key_template: LearnJob | None = None
        self.loaded: collections.OrderedDict[str, KeyState] = collections.OrderedDict()
        self.window: list[tuple[RawBatch, pd.DataFrame, np.ndarray]] = []
        self.window_rows = 0
        self.records = 0
        self.position: dict | None = None
        self.schema: Schema | None = None
        self.evictions = self.reloads = self.checkpoints = 0
        self.prior_seconds = 0.0
        self.resumes = 0
        self.stop = threading.Event()
        self.stopped: str | None = None
        self.source = None
        self._pending: list[RawBatch] = []
        self.quarantine = QuarantineFile(job.quarantine_path or DEFAULT_QUARANTINE)
        self.durable = job.checkpoint_path is not None
        if self.durable:
            self.state_dir = job.checkpoint_path
            os.makedirs(self.state_dir, exist_ok=True)
        else:
            self.state_dir = tempfile.mkdtemp(prefix="sapwood-keys-")
        self.manifest = self._read_manifest() if self.durable else None
        if self.manifest is not None:
            self._restore(self.manifest)
        elif job.schema_path:
            self.schema = _without_key(load_schema(job.schema_path), job.by)
        if self.durable and self.manifest is None:
            _clear_states(self.state_dir)     # of an attempt that never checkpointed
            if os.path.exists(self.quarantine.path):
                os.truncate(self.quarantine.path, 0)   # as a fresh checkpointed single run

    # ------------------------------------------------------------------ the run
    def run(self) -> dict:
        """Learn the stream to its end (or until stopped); returns the summary."""
        job = self.job
        warm = self.clock()
        warm_up()
        self.startup_seconds = self.clock() - warm
        self.started = self.last_checkpoint_at = self.clock()
        follow = FollowControl(job.poll_seconds, job.idle_exit, self.stop,
                               on_idle=self._on_quiet) if job.follow else None
        self.source = open_run_source(job, follow, self.position)
        live = job.follow or hasattr(self.source, "on_quiet")
        if hasattr(self.source, "on_quiet"):
            self.source.on_quiet = self._on_quiet
        handlers = self._catch_signals() if self.durable or job.follow else {}
        self._pending: list[RawBatch] = []
        held_since = None
        try:
            try:
                for batch in self.source.batches():
                    if self.schema is None:
                        self._pending.append(batch)
                        held_since = held_since if held_since is not None else self.clock()
                        # a live feed that never falls quiet is not held back for long
                        if held_enough(self._pending) or live and \
                                self.clock() - held_since >= LIVE_INFER_SECONDS:
                            self._start()
                    else:
                        self._dispatch(batch, live)
                    if self.stop.is_set():
                        break
            except FollowStopped as exc:
                self.stopped = self.stopped or exc.reason
            if self._pending:
                self._start()
            self._flush_all()
            if not self.durable and self.position is not None \
                    and hasattr(self.source, "commit"):
                self.source.commit(self.position)
            summaries = self._finish_keys()
            self.finished = self.clock()
            if self.durable and self.schema is not None:
                self._checkpoint(final=True)
        finally:
            for signum, handler in handlers.items():
                signal.signal(signum, handler)
            self.source.close()
            self.quarantine.close()
            for state in list(self.loaded.values()):
                state.run.close_fed()
            if not self.durable:
                shutil.rmtree(self.state_dir, ignore_errors=True)
        self._write_indexes(summaries)
        summary = self.summary(summaries)
        if job.summary_path:
            write_atomic(job.summary_path, json.dumps(summary, indent=2,
                                                      default=json_default) + "\n")
        failures = [f"key {s['key']!r}: {f}" for s in summaries for f in s.get("failures", [])]
        if failures:
            raise OutputError("; ".join(failures), summary)
        return summary

    def _start(self) -> None:
        """The schema from the records held back (the key field left out), then those
        records learned."""
        pending, self._pending = self._pending, []
        declared = {**self.job.declared, self.job.by: "ignore"}
        job = dataclasses.replace(self.job, declared=declared)
        columns = {c for b in pending for c in b.frame.columns}
        if self.job.by not in columns and any(len(b.frame) for b in pending):
            raise ConfigError(not_a_field("key field (--by)", self.job.by,
                                          sorted(map(str, columns))))
        self.schema = _without_key(infer_run_schema(pending, job, False), self.job.by)
        for batch in pending:
            self._dispatch(batch, False)

    # ------------------------------------------------------------------ splitting
    def _dispatch(self, batch: RawBatch, live: bool) -> None:
        """Take ``batch`` into the window (records without a key go to the quarantine);
        learn the window when it is full, a checkpoint is due, or the feed is live."""
        by = self.job.by
        frame, lines = batch.frame, batch.lines
        rejects = list(batch.rejects)
        if len(frame):
            values = frame[by] if by in frame.columns else pd.Series(
                [None] * len(frame), index=frame.index, dtype=object)
            absent = _absent(values)
            if absent.any():
                rejects += [Reject(batch.origin, int(line), by, None,
                                   "has no value for the key field (--by)")
                            for line in lines[absent]]
                keep = ~absent
                frame, lines = frame[keep], lines[keep]
        if rejects:
            if self.job.strict:
                first = min(rejects, key=lambda r: (r.line, r.field or ""))
                raise RecordError(first.message() + " (strict mode stops here)")
            before = self.quarantine.count
            self.quarantine.write(sorted(rejects, key=lambda r: (r.line, r.field or "")))
            self.records += self.quarantine.count - before
        if len(frame):
            if self.window and self.window[0][0].origin != batch.origin:
                self._flush_all()              # a window holds records of one origin
            self.window.append((batch, frame, lines))
            self.window_rows += len(frame)
            self.records += len(frame)
        if batch.position is not None:
            self.position = batch.position
        if live or self.window_rows >= WINDOW_RECORDS:
            self._flush_all()
            if not self.durable and self.position is not None \
                    and hasattr(self.source, "commit"):
                self.source.commit(self.position)   # learned; nothing durable to wait for
        if self.durable and self._checkpoint_due():
            self._checkpoint()
        if self.progress is not None:
            elapsed = max(self.clock() - self.started, 1e-9)
            self.progress({"records": self.records, "quarantined": self.quarantine.count,
                           "seconds": elapsed, "rate": self.records / elapsed,
                           "keys": len(self.keys)})

    # ------------------------------------------------------------------ learning
    def _flush_all(self) -> None:
        """Split the window by key (one stable sort) and learn each key's records, in
        their order, keys in the order they first appear in the window."""
        if not self.window:
            return
        window, self.window, self.window_rows = self.window, [], 0
        fence_check = getattr(self.source, "fence_check", None)
        if fence_check is not None:
            fence_check()           # superseded: write no output of this window
        first = window[0][0]
        frame = window[0][1] if len(window) == 1 else pd.concat(
            [w[1] for w in window], ignore_index=True)
        lines = np.concatenate([w[2] for w in window])
        keyed = any(w[0].keyed for w in window)
        codes, uniques = pd.factorize(key_text(frame[self.job.by]), sort=False)
        # a stable sort of 16-bit codes is a radix sort in numpy: 0.02 s for 1M records
        # against 0.1 s for 64-bit codes (measured)
        order = np.argsort(codes.astype(np.uint16) if len(uniques) <= 1 << 16 else codes,
                           kind="stable")
        bounds = np.concatenate([[0], np.cumsum(np.bincount(codes, minlength=len(uniques)))])
        whole = RawBatch(frame, first.origin, lines, keyed=keyed)
        # the window's columns read once, then put in key order once, so that each key's
        # records are one stretch of rows (no scattered reads per key)
        prepared = prepare_columns(self.schema, whole)
        # the key's records: their columns were read with the window's, so the batch
        # handed on carries only their count (a frame without columns)
        counted = pd.DataFrame(index=pd.RangeIndex(len(frame)))
        ordered = prepared.take(order, RawBatch(counted, first.origin, lines[order]),
                                measure=False)
        for code, key in enumerate(uniques.tolist()):
            state = self.keys.get(key)
            if state is None:
                state = self.keys[key] = KeyState(key, key_folder(key))
            run = self._load(state)
            rows = slice(int(bounds[code]), int(bounds[code + 1]))
            mine = RawBatch(counted.iloc[rows], first.origin, ordered.lines[rows],
                            keyed=keyed)
            run.feed(mine, ordered.take(rows, mine, run.encoder.decimals))
            state.dirty = True

    def _load(self, state: KeyState) -> LearnRun:
        """``state``'s run, loaded from its state file (or new) if not in memory."""
        if state.run is not None:
            self.loaded.move_to_end(state.key)
            return state.run
        while len(self.loaded) >= self.job.keys_in_memory:
            self._evict(next(iter(self.loaded.values())))
        job = self._key_job(state)
        fresh = state.gen == 0
        for directory in (job.snapshot_dir, _parent(job.metrics_path),
                          _parent(job.events_path), _parent(job.predictions_path),
                          _parent(job.save_path)) if fresh else ():
            if directory:
                os.makedirs(directory, exist_ok=True)
        if fresh and self.resumes and job.snapshot_dir:
            rollback_snapshots(job.snapshot_dir, 0)   # a key begun after the checkpoint
        if fresh and self.durable and os.path.exists(job.quarantine_path):
            os.truncate(job.quarantine_path, 0)       # of an attempt that did not last
        run = LearnRun(job, clock=self.clock, wall=self.wall, warn=self.warn,
                       schema=self.schema)
        run.open_fed()
        self.reloads += not fresh
        state.run = run
        self.loaded[state.key] = state
        return run

    def _key_job(self, state: KeyState) -> LearnJob:
        """The job of ``state``'s run: the keyed job's, checked once (the template), with
        the key's own paths. The settings the options give are worked out once too: a
        key's run asks for them when it starts, 1,000 times for 1,000 keys."""
        job, folder = self.job, state.folder
        if self._key_template is None:
            template = dataclasses.replace(
                job, by=None, schema_path=None, declared={}, fmt=None,
                header=None, summary_path=None, checkpoint_path=None,
                checkpoint_every=0, checkpoint_seconds=0.0, follow=False, idle_exit=None)
            if self.schema is not None:
                template.learner_settings(self.schema.task)   # worked out and kept
            self._key_template = template
        mine = copy.copy(self._key_template)
        mine.save_path = keyed_path(job.save_path, folder)
        mine.snapshot_dir = keyed_path(job.snapshot_dir, folder, directory=True)
        mine.metrics_path = keyed_path(job.metrics_path, folder)
        mine.events_path = keyed_path(job.events_path, folder)
        mine.predictions_path = keyed_path(job.predictions_path, folder)
        mine.quarantine_path = self._key_quarantine(folder)
        mine.checkpoint_path = self._state_path(state, state.gen) if state.gen else None
        return mine

    def _key_quarantine(self, folder: str) -> str:
        """Where a key's own rejects go (records its encoder refuses): in the key's folder
        of the first output folder, or beside the quarantine named (``<key>.<name>``);
        created at the first reject."""
        homes = self._homes()
        if homes and not self.job.quarantine_path:
            return os.path.join(homes[0], folder, DEFAULT_QUARANTINE)
        head, name = os.path.split(self.job.quarantine_path or DEFAULT_QUARANTINE)
        return os.path.join(head, f"{folder}.{name}")

    def _state_path(self, state: KeyState, gen: int) -> str:
        return os.path.join(self.state_dir, f"{state.folder}.state-{gen}.ckpt")

    def _save_state(self, state: KeyState) -> None:
        """Write ``state``'s run to a new state file; the one before it goes unless the
        last checkpoint names it."""
        run = state.run
        previous = state.gen
        state.gen += 1
        self._point(run, self._state_path(state, state.gen))
        run.checkpoint.write(run)
        state.dirty = False
        if previous and previous != state.saved_gen:
            _remove(self._state_path(state, previous))

    def _point(self, run: LearnRun, path: str) -> None:
        """Make ``run`` write its next state to ``path`` (a key begun in this run has no
        checkpoint yet: looking for one costs file-system calls every new key would
        pay)."""
        if run.checkpoint is None:
            run.checkpoint = RunCheckpoint(dataclasses.replace(run.job, checkpoint_path=path),
                                           self.warn)
        run.checkpoint.path = path
        run.checkpoint.guard = getattr(self.source, "fence_check", None)

    def _evict(self, state: KeyState) -> None:
        """Save ``state``'s key and drop it from memory."""
        if state.dirty or state.gen == 0:
            self._save_state(state)
        state.run.close_fed()
        state.run = None
        del self.loaded[state.key]
        self.evictions += 1

    def _finish_keys(self) -> list[dict]:
        """Every key's run concluded (last snapshot, model, summary), one at a time."""
        if self.schema is None:
            return []
        summaries = []
        for state in self.keys.values():
            run = self._load(state)
            run.stopped = self.stopped
            if self.durable:
                previous = state.gen
                state.gen += 1
                self._point(run, self._state_path(state, state.gen))
                if previous and previous != state.saved_gen:
                    _remove(self._state_path(state, previous))
            else:
                run.checkpoint = None
            try:
                summary = run.finish_fed()
            except OutputError as exc:
                summary = exc.summary or {"failures": [str(exc)]}
            state.run = None
            del self.loaded[state.key]
            state.dirty = False
            summary = {"key": state.key, "folder": state.folder, **summary}
            state.summary = summary
            summaries.append(summary)
        return summaries

    # ------------------------------------------------------------------ checkpoints
    def _checkpoint_due(self) -> bool:
        job = self.job
        every, seconds = job.checkpoint_every, job.checkpoint_seconds
        since = self.records - getattr(self, "_checkpointed_records", 0)
        limit = getattr(self.source, "max_uncommitted", None)
        return bool((every and since >= every) or
                    (seconds and self.clock() - self.last_checkpoint_at >= seconds) or
                    (limit is not None and since >= limit))

    def _checkpoint(self, final: bool = False) -> None:
        """Every key's state, then the file that names them with the source position;
        then the source may acknowledge."""
        if not final:
            self._flush_all()
            for state in self.loaded.values():
                if state.dirty or state.gen == 0:
                    self._save_state(state)
        manifest = {
            "keyed_checkpoint_version": MANIFEST_VERSION,
            "written_at": iso_now(self.wall()),
            "job": job_fingerprint(self.job),
            "schema": self.schema.to_dict(),
            "source": json_ready(self.position),
            "records": self.records,
            "quarantine": {"count": self.quarantine.count,
                           "bytes": _flushed_length(self.quarantine)},
            "seconds": self.prior_seconds + (self.clock() - self.started),
            "resumes": self.resumes, "evictions": self.evictions,
            "keys": {s.key: {"folder": s.folder, "state": s.gen}
                     for s in self.keys.values()},
        }
        write_atomic(os.path.join(self.state_dir, MANIFEST_NAME),
                     json.dumps(manifest, indent=1) + "\n",
                     getattr(self.source, "fence_check", None))
        for state in self.keys.values():
            if state.saved_gen and state.saved_gen != state.gen:
                _remove(self._state_path(state, state.saved_gen))
            state.saved_gen = state.gen
        self.checkpoints += 1
        self._checkpointed_records = self.records
        self.last_checkpoint_at = self.clock()
        if self.position is not None and hasattr(self.source, "commit"):
            self.source.commit(self.position)

    def _read_manifest(self) -> dict | None:
        path = os.path.join(self.state_dir, MANIFEST_NAME)
        if not os.path.exists(path):
            return None
        try:
            with open(path, encoding="utf-8") as handle:
                manifest = json.load(handle)
            if manifest["keyed_checkpoint_version"] != MANIFEST_VERSION:
                raise ValueError(f"version {manifest['keyed_checkpoint_version']!r}")
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise ModelFileError(f"keyed checkpoint {path!r} is not usable: {exc}") from exc
        check_fingerprint(manifest["job"], job_fingerprint(self.job), path)
        return manifest

    def _restore(self, manifest: dict) -> None:
        """Take up the keyed checkpoint: keys and their state files (newer ones
        removed), counters, the quarantine cut back, the source position."""
        self.schema = Schema.from_dict(manifest["schema"])
        self.records = int(manifest["records"])
        self._checkpointed_records = self.records
        self.position = manifest["source"]
        self.prior_seconds = float(manifest["seconds"])
        self.resumes = int(manifest["resumes"]) + 1
        self.evictions = int(manifest.get("evictions", 0))
        quarantine = manifest["quarantine"]
        self.quarantine.count = int(quarantine["count"])
        truncate_for_resume(self.quarantine.path, quarantine["bytes"], "quarantine file")
        named = set()
        for key, entry in manifest["keys"].items():
            state = KeyState(str(key), str(entry["folder"]), gen=int(entry["state"]),
                             saved_gen=int(entry["state"]))
            self.keys[state.key] = state
            named.add(os.path.basename(self._state_path(state, state.gen)))
        _clear_states(self.state_dir, keep=named)

    # ------------------------------------------------------------------ live feeds
    def _on_quiet(self) -> None:
        """A live feed waited and nothing came: a slow feed is not held back until
        ``INFER_ROWS`` records have come; learn what waits, checkpoint if due."""
        if self.schema is None and self._pending:
            self._start()
        if self.schema is not None:
            self._flush_all()
            if self.durable and self.job.checkpoint_seconds and \
                    self.clock() - self.last_checkpoint_at >= self.job.checkpoint_seconds:
                self._checkpoint()
        if self.stop.is_set():
            raise FollowStopped("stop")


    # ------------------------------------------------------------------ results
    def _homes(self) -> list[str]:
        """The folders that hold key folders."""
        job = self.job
        homes = [job.snapshot_dir] + [_parent(p) or "." for p in (
            job.summary_path, job.save_path, job.metrics_path, job.events_path,
            job.predictions_path) if p]
        seen: list[str] = []
        for home in homes:
            if home and os.path.abspath(home) not in map(os.path.abspath, seen):
                seen.append(home)
        return seen

    def _write_indexes(self, summaries: list[dict]) -> None:
        if self.schema is None:
            return
        head = {"by": self.job.by, "target": self.job.target, "task": self.schema.task}
        text = _index_text(head, [_index_entry(s) for s in summaries])
        for home in self._homes():
            os.makedirs(home, exist_ok=True)
            write_atomic(os.path.join(home, INDEX_NAME), text)
            write_atomic(os.path.join(home, SCHEMA_NAME),
                         json.dumps(self.schema.to_dict(), indent=2) + "\n")

    def summary(self, summaries: list[dict]) -> dict:
        """The keyed run's summary: counts over all keys, pooled scores, where the
        index is."""
        learned = sum(s.get("learned", 0) for s in summaries)
        seconds = self.prior_seconds + max(self.finished - self.started, 0.0)
        out = {
            "by": self.job.by, "keys": len(self.keys), "records": self.records,
            "learned": learned,
            "quarantined": self.quarantine.count + sum(s.get("quarantined", 0)
                                                       for s in summaries),
            "task": self.schema.task if self.schema else None, "target": self.job.target,
            "seconds": round(seconds, 6),
            "records_per_second": round(self.records / seconds, 1) if seconds > 0 else None,
            "startup_seconds": round(self.startup_seconds, 6),
            "keys_in_memory": self.job.keys_in_memory, "evictions": self.evictions,
            "reloads": self.reloads, "resumes": self.resumes,
            "index": [os.path.join(h, INDEX_NAME) for h in self._homes()],
            "quarantine": self.quarantine.path,
        }
        out.update(_pooled(summaries, self.schema.task if self.schema else None))
        if self.durable:
            out["checkpoint"] = {"path": self.job.checkpoint_path,
                                 "written": self.checkpoints}
        if self.stopped:
            out["stopped"] = self.stopped
        return out


def _pooled(summaries: list[dict], task: str | None) -> dict:
    """Scores over all keys' records: accuracy, or MAE and RMSE, weighted by records
    learned."""
    learned = [(s, s.get("learned", 0)) for s in summaries if s.get("learned")]
    total = sum(n for _, n in learned)
    if not total:
        return {}
    if task == "regression":
        mae = sum((s.get("mae") or 0.0) * n for s, n in learned) / total
        mse = sum((s.get("rmse") or 0.0) ** 2 * n for s, n in learned) / total
        return {"mae": mae, "rmse": mse ** 0.5}
    return {"accuracy": sum((s.get("accuracy") or 0.0) * n for s, n in learned) / total}


def _index_text(head: dict, entries: list[dict]) -> str:
    """The index as JSON text, one key per line (json's compact encoder is compiled; its
    indenting one is not: 0.1 s for 1,000 keys, measured)."""
    lines = ",\n ".join(json.dumps(e, default=json_default) for e in entries)
    return json.dumps(head, default=json_default)[:-1] + f', "keys": [\n {lines}\n]}}\n'


_NOT_INDEXED = {"seconds", "records_per_second", "startup_seconds", "resumes",
                "resumed_at", "target", "task"}


def _index_entry(summary: dict) -> dict:
    """A key's line in the index: its summary's figures (no timings, paths or lists)."""
    return {k: v for k, v in summary.items() if k not in _NOT_INDEXED
            and (v is None or isinstance(v, (str, int, float, bool)))}


def _absent(values: pd.Series) -> np.ndarray:
    """Where a key value is missing (as :func:`~stream.run.values.missing_mask` says),
    on text columns without turning them into Python strings first."""
    if values.dtype.kind in "OSU" or isinstance(values.dtype, pd.StringDtype):
        return (values.isna() | values.isin(list(MISSING_MARKERS))).to_numpy(dtype=bool)
    return missing_mask(values)


def _without_key(schema: Schema, field: str) -> Schema:
    """``schema`` with the key field ignored (a key is not a feature of its tree)."""
    data = schema.to_dict()
    for entry in data.get("fields", []):
        if entry.get("name") == field and entry.get("kind") != "ignore":
            entry["kind"] = "ignore"
    return Schema.from_dict(data)


def _parent(path: str | None) -> str | None:
    if path is None:
        return None
    return os.path.dirname(path) or None


def _flushed_length(quarantine: QuarantineFile) -> int | None:
    """The quarantine's length (its writer flushes after every batch), or None."""
    return fsync_length(quarantine.path) if os.path.exists(quarantine.path) else None


_STATE_FILE = re.compile(r".+\.state-\d+\.ckpt(\.prev|\.corrupt)?$")


def _clear_states(directory: str, keep: set[str] = frozenset()) -> None:
    """Remove the keys' state files in ``directory`` but those named in ``keep``."""
    for entry in os.scandir(directory):
        if entry.is_file() and _STATE_FILE.match(entry.name) and entry.name not in keep:
            os.unlink(entry.path)


def _remove(path: str) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass
