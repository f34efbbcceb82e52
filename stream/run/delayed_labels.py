"""Delayed labels: records are predicted when they arrive and learned when their label comes.

Inside: :class:`PendingRecords` (records waiting for a label: numpy arrays in arrival
order plus a hash index by id), :class:`EarlyLabels` (labels that came before their
record), :class:`LabelFeed` (the label source, encoded, in merge order) and
:class:`DelayedLabels`, which a learning run (:mod:`stream.run.engine`) hands every batch.

How records and labels are put in one order
-------------------------------------------
Both streams carry the schema's time field. Records keep their stream order, labels
theirs; a label comes before the first record whose watermark (the highest record time
so far) is later than the label's own watermark (the highest label time so far). At
equal times the record comes first, so a label stamped with its record's time follows
it. The order depends only on the data, never on batch sizes, and a resumed run meets
it again exactly.

What happens to a record
------------------------
* It is predicted on arrival; the prediction is written then, and it is the one scored
  when the label comes (score-then-learn holds: the prediction never saw the label).
* With a label of its own (the target is present) or one that came early, it is scored
  and learned at once, as without delayed labels.
* Otherwise it waits, keyed by its id, for at most ``window`` further records and, if
  ``seconds`` is set, until the watermark is more than ``seconds`` past its arrival. A
  record whose label does not come in time is dropped and counted (``expired``); one
  without an id cannot be joined and is counted (``no_id``); a later record with the same
  id replaces a waiting one (``replaced``).
* A label is applied in label order: its record is learned with the label and scored
  with its arrival prediction. A label with no waiting record waits itself (it may have
  come before its record) within the same window, then is counted (``unmatched``).

Memory is bounded: at most ``window`` records (their features, prediction, time, line
and id) and ``window`` early labels are held, whatever the stream does.

Label sources
-------------
Files are read in step with the records, so the order above depends on the data alone.
A broker (one ``mqtt[s]://`` topic filter or ``redis[s]://`` stream URL) is live: once
per batch of records it is polled for what has arrived so far (a read that waits about a
millisecond), and labels that have not arrived yet are met with later records. The order
then also depends on when labels reach the broker, so a run is not repeatable the way a
file run is; a checkpoint still holds the label source's position and the labels read
but not yet applied, and label messages are acknowledged only once such a checkpoint is
written, so after a restart none is lost or applied twice. When the records end, labels
that have not arrived by the last poll stay unacknowledged for the next run.

Limitations: standard input and a followed file are not label sources; a record's
features learned at label time are those it arrived with.
"""

from __future__ import annotations

import collections
import math
from typing import Any, Protocol

import numpy as np

from connectors.broker_payloads import scheme_of
from connectors.brokers import BROKERS, open_broker
from connectors.sources import open_sources
from stream.errors import ConfigError

from .encoding import EncodedBatch


class LabelledRun(Protocol):
    """What the delayed labels use of the run they serve (:class:`stream.run.engine.LearnRun`):
    its job and schema, its encoder and quarantine for label rows, and the learning of
    records once labelled."""

    job: Any
    schema: Any
    task: Any
    quarantine: Any
    last_time: float | None

    def encode(self, raw: Any, labels_optional: bool = False,
               count: bool = True) -> EncodedBatch: ...

    def learn_stretch(self, batch: EncodedBatch, arrival: Any = None) -> None: ...

    def emit_predictions(self, batch: EncodedBatch, part: slice, scored: Any) -> None: ...

_NO_TIME = -math.inf

POLL_SECONDS = 0.001
"""How long a poll of a live label source waits for one more message before it gives up
for this batch of records (the source's ``idle_exit`` and ``linger``)."""


def watermarks(times: np.ndarray | None, start: float) -> np.ndarray:
    """Running maximum of ``times`` (NaN carries the previous value), from ``start``."""
    if times is None or not len(times):
        return np.full(0 if times is None else len(times), start)
    filled = np.where(np.isnan(times), -np.inf, times)
    return np.maximum.accumulate(np.concatenate(([start], filled)))[1:]


class _Arrival:
    """Arrival-time predictions of records learned later, in the shape tasks score."""

    def __init__(self, pred: np.ndarray) -> None:
        self.pred = pred

    def part(self, part: slice) -> "_Arrival":
        return _Arrival(self.pred[part])


def _pack_ids(ids: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Strings as UTF-8 bytes back to back plus their end offsets (no pickle)."""
    blobs = [i.encode("utf-8") for i in ids]
    ends = np.cumsum([len(b) for b in blobs], dtype=np.int64) if blobs \
        else np.zeros(0, np.int64)
    return np.frombuffer(b"".join(blobs), np.uint8).copy(), ends


def _unpack_ids(data: np.ndarray, ends: np.ndarray) -> list[str]:
    raw = data.tobytes()
    starts = np.concatenate(([0], ends[:-1])) if len(ends) else ends
    return [raw[a:b].decode("utf-8") for a, b in zip(starts.tolist(), ends.tolist())]


class PendingRecords:
    """Records waiting for their label, in arrival order, at most ``window`` of them.

    A ring of numpy arrays (features, arrival prediction, time, watermark, line) with a
    dict from id to slot as the join's hash index. Arrival number ``s`` lives in slot
    ``s % window``; when arrival ``s + window`` takes the slot, ``s`` has waited a full
    window and expires.
    """

    def __init__(self, n_features: int, window: int) -> None:
        self.window = window
        self.X = np.empty((window, n_features))
        self.pred = np.empty(window)
        self.times = np.empty(window)
        self.marks = np.empty(window)
        self.lines = np.empty(window, np.int64)
        self.ids = np.empty(window, dtype=object)
        self.alive = np.zeros(window, bool)
        self.index: dict[str, int] = {}
        self.arrivals = 0      # arrival number of the next record
        self.head = 0          # oldest arrival that may still wait
        self.expired = 0
        self.replaced = 0

    def __len__(self) -> int:
        return len(self.index)

    def add(self, ids: np.ndarray, X: np.ndarray, pred: np.ndarray, times: np.ndarray,
            marks: np.ndarray, lines: np.ndarray) -> int:
        """Records arrive, in this order, and wait; those without an id (``""``) only
        take their turn in the window. Returns how many had no id."""
        n = len(ids)
        if not n:
            return 0
        slots = (self.arrivals + np.arange(n)) % self.window
        no_id = 0
        for i, key in enumerate(ids.tolist()):
            slot = int(slots[i])
            if self.alive[slot]:           # waited a whole window
                self.expired += 1
                del self.index[self.ids[slot]]
                self.alive[slot] = False
            if key == "":
                no_id += 1
                self.arrivals += 1
                continue
            old = self.index.get(key)
            if old is not None:            # the same id again: the new record counts
                self.replaced += 1
                self.alive[old] = False
            self.index[key] = slot
            self.ids[slot] = key
            self.alive[slot] = True
            self.arrivals += 1
            self.head = max(self.head, self.arrivals - self.window)
        self.head = max(self.head, self.arrivals - self.window)
        self.X[slots] = X
        self.pred[slots] = pred
        self.times[slots] = times
        self.marks[slots] = marks
        self.lines[slots] = lines
        return no_id

    def skip(self, n: int) -> None:
        """``n`` records arrived that do not wait (labelled, or without an id)."""
        for _ in range(n):
            slot = self.arrivals % self.window
            if self.alive[slot]:
                self.expired += 1
                del self.index[self.ids[slot]]
                self.alive[slot] = False
            self.arrivals += 1
        self.head = max(self.head, self.arrivals - self.window)

    def expire_before(self, mark: float) -> None:
        """Drop the waiting records that arrived when the watermark was below ``mark``."""
        # arrival watermarks only grow, so the records to drop are the oldest ones;
        # slots no longer waiting are passed over (their marks may be stale)
        while self.head < self.arrivals:
            slot = self.head % self.window
            if self.alive[slot]:
                if self.marks[slot] >= mark:
                    return
                self.expired += 1
                del self.index[self.ids[slot]]
                self.alive[slot] = False
            self.head += 1

    def take(self, ids: list[str]) -> np.ndarray:
        """Slots of the records ``ids`` label (-1 where none waits); they stop waiting."""
        slots = np.array([self.index.pop(key, -1) for key in ids], np.int64)
        found = slots[slots >= 0]
        self.alive[found] = False
        return slots

    # -- checkpoint ------------------------------------------------------------------
    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        order = sorted(self.index.values(),
                       key=lambda s: (s - self.arrivals) % self.window)
        slots = np.array(order, np.int64)
        id_bytes, id_ends = _pack_ids([self.ids[s] for s in order])
        meta = {"arrivals": self.arrivals, "head": self.head, "expired": self.expired,
                "replaced": self.replaced,
                "slots": slots.tolist()}
        arrays = {"X": self.X[slots], "pred": self.pred[slots], "times": self.times[slots],
                  "marks": self.marks[slots], "lines": self.lines[slots],
                  "id_bytes": id_bytes, "id_ends": id_ends}
        return meta, arrays

    def restore(self, meta: dict, arrays: dict[str, np.ndarray]) -> None:
        slots = np.array(meta["slots"], np.int64)
        ids = _unpack_ids(arrays["id_bytes"], arrays["id_ends"])
        self.arrivals, self.head = int(meta["arrivals"]), int(meta["head"])
        self.expired, self.replaced = int(meta["expired"]), int(meta["replaced"])
        for name in ("X", "pred", "times", "marks", "lines"):
            getattr(self, name)[slots] = arrays[name]
        for slot, key in zip(slots.tolist(), ids):
            self.ids[slot] = key
            self.alive[slot] = True
            self.index[key] = slot


class EarlyLabels:
    """Labels that came before their record (or after it expired), at most ``window``.

    A label waits while fewer than ``window`` records have arrived since it came and,
    with ``seconds``, while the watermark is within ``seconds`` of its own.
    """

    def __init__(self, window: int) -> None:
        self.window = window
        self.labels: dict[str, tuple[float, int, float]] = {}   # id -> (y, arrival, mark)
        self.order: collections.deque[tuple[str, int]] = collections.deque()
        self.unmatched = 0

    def __len__(self) -> int:
        return len(self.labels)

    def add(self, ids: list[str], y: np.ndarray, arrivals: int, marks: np.ndarray) -> None:
        for key, value, mark in zip(ids, y.tolist(), marks.tolist()):
            if key in self.labels:
                self.unmatched += 1  # a second label for the same id replaces the first
            self.labels[key] = (value, arrivals, mark)
            self.order.append((key, arrivals))
        while len(self.labels) > self.window:
            self._drop_oldest()

    def expire(self, arrivals: int, mark: float | None) -> None:
        """Drop labels older than the window (records) or ``mark`` (watermark)."""
        while self.order:
            key, came = self.order[0]
            entry = self.labels.get(key)
            if entry is None or entry[1] != came:
                self.order.popleft()   # replaced by a later label for the same id
                continue
            if arrivals - came >= self.window or (mark is not None and entry[2] < mark):
                self._drop_oldest()
                continue
            return

    def _drop_oldest(self) -> None:
        key, came = self.order.popleft()
        entry = self.labels.get(key)
        if entry is not None and entry[1] == came:
            del self.labels[key]
            self.unmatched += 1

    def take(self, ids: np.ndarray, marks: np.ndarray, seconds: float | None):
        """(mask, y) of records whose label came early; those labels are used up. With
        ``seconds``, a label whose watermark is more than that before the record's is
        too old for it."""
        found = np.zeros(len(ids), bool)
        y = np.zeros(len(ids))
        if not self.labels:
            return found, y
        for i, key in enumerate(ids.tolist()):
            entry = self.labels.get(key)
            if entry is None:
                continue
            if seconds is not None and entry[2] < marks[i] - seconds:
                continue  # too old for this record; expires in time
            del self.labels[key]
            found[i] = True
            y[i] = entry[0]
        return found, y

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        keys = [k for k, came in self.order if k in self.labels and self.labels[k][1] == came]
        id_bytes, id_ends = _pack_ids(keys)
        arrays = {"id_bytes": id_bytes, "id_ends": id_ends,
                  "y": np.array([self.labels[k][0] for k in keys], float),
                  "arrivals": np.array([self.labels[k][1] for k in keys], np.int64),
                  "marks": np.array([self.labels[k][2] for k in keys], float)}
        return {"unmatched": self.unmatched}, arrays

    def restore(self, meta: dict, arrays: dict[str, np.ndarray]) -> None:
        self.unmatched = int(meta["unmatched"])
        keys = _unpack_ids(arrays["id_bytes"], arrays["id_ends"])
        for key, y, came, mark in zip(keys, arrays["y"].tolist(),
                                      arrays["arrivals"].tolist(), arrays["marks"].tolist()):
            self.labels[key] = (y, int(came), mark)
            self.order.append((key, int(came)))


class LabelFeed:
    """The label source, encoded by the run's encoder, handed out in merge order.

    Labels read but not applied yet (the rest of the last batch read) travel in the
    checkpoint with the position of that batch.
    """

    def __init__(self, run: LabelledRun, specs: list[str], batch_rows: int) -> None:
        self.run = run
        self.live = any(scheme_of(spec) in BROKERS for spec in specs)
        if self.live:
            if len(specs) != 1:
                raise ConfigError("labels from a broker come from one URL, not with others")
            self.source = open_broker(specs[0], batch_rows, idle_exit=POLL_SECONDS,
                                      linger=POLL_SECONDS)
        else:
            self.source = open_sources(specs, None, batch_rows)
            if not hasattr(self.source, "seek") or \
                    not getattr(self.source, "resumable", True):
                raise ConfigError("labels must come from files or a broker (standard "
                                  "input cannot be read again after a restart)")
        self._batches = None
        self._may_poll = True
        self.position: dict | None = None
        self.high = _NO_TIME
        self.ended = False
        self.ids: list[str] = []
        self.y = np.zeros(0)
        self.marks = np.zeros(0)
        self.read = 0
        self.rejected = 0

    def seek(self, position: dict | None) -> None:
        if position is not None:
            self.source.seek(position)
            self.position = position

    def poll_again(self) -> None:
        """A live source may be asked once more for what has arrived (called once per
        batch of records)."""
        self._may_poll = True

    def _pull(self) -> bool:
        """Read and encode label batches until some labels are waiting; False at the end
        of a file source, or when a live source has nothing more for now."""
        while not len(self.ids):
            if self._batches is None:
                if self.live and not self._may_poll:
                    return False
                self._batches = iter(self.source.batches())
            raw = next(self._batches, None)
            if raw is None:
                self._batches = None
                if self.live:
                    self._may_poll = False   # nothing more now: ask with the next records
                else:
                    self.ended = True
                return False
            quarantine = self.run.quarantine
            before = quarantine.count
            batch = self.run.encode(raw, count=False)
            self.rejected += quarantine.count - before
            quarantine.count = before   # the quarantine count is of records
            if raw.position is not None:
                self.position = raw.position
            if batch.ids is None:
                raise ConfigError("the label rows have no id field")
            marks = watermarks(batch.times, self.high)
            if len(marks):
                self.high = float(marks[-1])
            self.read += len(batch)
            self.ids = batch.ids.tolist()
            self.y = np.asarray(batch.y, float)
            self.marks = marks
        return True

    def next_mark(self) -> float | None:
        """The watermark of the next label, None when no label is left."""
        if not len(self.ids) and (self.ended or not self._pull()):
            return None
        return float(self.marks[0])

    def take_before(self, mark: float) -> tuple[list[str], np.ndarray, np.ndarray]:
        """(ids, labels, watermarks) of the labels waiting with a watermark below
        ``mark`` (some may stay)."""
        count = int(np.searchsorted(self.marks, mark, side="left"))
        ids, y, marks = self.ids[:count], self.y[:count], self.marks[:count]
        self.ids, self.y, self.marks = self.ids[count:], self.y[count:], self.marks[count:]
        return ids, y, marks

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        id_bytes, id_ends = _pack_ids(self.ids)
        return ({"high": self.high if math.isfinite(self.high) else None,
                 "read": self.read, "rejected": self.rejected},
                {"id_bytes": id_bytes, "id_ends": id_ends, "y": self.y.copy(),
                 "marks": np.asarray(self.marks, float).copy()})

    def restore(self, meta: dict, arrays: dict[str, np.ndarray]) -> None:
        self.high = _NO_TIME if meta["high"] is None else float(meta["high"])
        self.read, self.rejected = int(meta["read"]), int(meta["rejected"])
        self.ids = _unpack_ids(arrays["id_bytes"], arrays["id_ends"])
        self.y, self.marks = arrays["y"], arrays["marks"]

    def close(self) -> None:
        self.source.close()


class DelayedLabels:
    """The join of a learning run's records with labels from their own source."""

    def __init__(self, run: LabelledRun) -> None:
        job = run.job
        self.run = run
        self.window = job.label_window
        self.seconds = job.label_seconds or None
        self.feed: LabelFeed | None = None
        self.pending: PendingRecords | None = None
        self.early = EarlyLabels(self.window)
        self.watermark = _NO_TIME
        self.joined = 0
        self.inline = 0
        self.no_id = 0
        self._restored: tuple | None = None

    # -- life cycle --------------------------------------------------------------------
    def open(self, batch_rows: int) -> None:
        self.feed = LabelFeed(self.run, self.run.job.labels, batch_rows)
        if self._restored is not None:
            meta, feed_arrays = self._restored
            self.feed.seek(meta["labels_source"])
            self.feed.restore(meta["labels"]["feed"], feed_arrays)

    def _ready(self) -> None:
        if self.pending is not None:
            return
        schema = self.run.schema
        if schema.time_field is None:
            raise ConfigError("delayed labels are put in order with the records by data "
                              "time: the schema needs a time field (declare one with "
                              "--kind FIELD=time)")
        if schema.id_field is None:
            raise ConfigError("delayed labels are joined by id: the schema needs an id "
                              "field (name it with --id-field)")
        self.pending = PendingRecords(len(schema.feature_names), self.window)

    def close(self) -> None:
        if self.feed is not None:
            self.feed.close()

    # -- the join ----------------------------------------------------------------------
    def consume(self, batch: EncodedBatch) -> None:
        """Records of one batch, in order, with the labels that fall between them."""
        self._ready()
        self.feed.poll_again()
        marks = watermarks(batch.times, self.watermark)
        n, pos = len(batch), 0
        while pos < n:
            label = self.feed.next_mark()
            stop = n if label is None else \
                pos + int(np.searchsorted(marks[pos:], label, side="right"))
            if stop > pos:
                self._arrive(batch, pos, stop, marks)
                pos = stop
            if label is not None and pos < n:
                self.watermark = float(marks[pos - 1]) if pos else self.watermark
                self._apply(*self.feed.take_before(float(marks[pos])))
        if n:
            self.watermark = float(marks[-1])
            self.run.last_time = None if not math.isfinite(self.watermark) \
                else self.watermark

    def finish(self) -> None:
        """The records ended: the labels still to come (from a live source: those that
        have arrived) are applied."""
        self._ready()
        self.feed.poll_again()
        while self.feed.next_mark() is not None:
            self._apply(*self.feed.take_before(math.inf))

    def _arrive(self, batch: EncodedBatch, a: int, b: int, marks: np.ndarray) -> None:
        """Records a..b arrive: predicted; learned now if labelled, else they wait."""
        run, task = self.run, self.run.task
        y = batch.y[a:b]
        ids = batch.ids[a:b]
        now = task.labelled(y)
        early, early_y = self.early.take(ids, marks[a:b], self.seconds)
        if early.any():
            y = y.copy()
            y[early] = early_y[early].astype(y.dtype)
            now |= early
        self.inline += int(now.sum())
        # runs of labelled and waiting records, in stream order
        cuts = np.flatnonzero(np.diff(now.astype(np.int8))) + 1
        for lo, hi in zip(np.concatenate(([0], cuts)), np.concatenate((cuts, [b - a]))):
            part = slice(a + int(lo), a + int(hi))
            if now[lo]:
                self.pending.skip(hi - lo)
                labelled = _part(batch, part)
                labelled.y = y[lo:hi]
                run.learn_stretch(labelled)
                continue
            scored = task.predict(batch.X[part])
            run.emit_predictions(batch, part, scored)
            self.no_id += self.pending.add(ids[lo:hi], batch.X[part],
                                           np.asarray(scored.pred, float),
                                           batch.times[part], marks[part],
                                           batch.lines[part])
        self.early.expire(self.pending.arrivals, self._oldest(float(marks[b - 1])))

    def _oldest(self, mark: float) -> float | None:
        return None if self.seconds is None else mark - self.seconds

    def _apply(self, ids: list[str], y: np.ndarray, marks: np.ndarray) -> None:
        """Labels in label order: their records are scored (arrival prediction) and
        learned; labels without a waiting record wait themselves. With ``seconds``, a
        label more than that (data time) after its record's arrival finds it expired."""
        if not ids:
            return
        p = self.pending
        slots = p.take(ids)
        found = slots >= 0
        if self.seconds is not None and found.any():
            late = found.copy()
            late[found] = marks[found] - p.marks[slots[found]] > self.seconds
            p.expired += int(late.sum())
            found &= ~late
            slots = np.where(late, -2, slots)   # used up, not waiting as early labels
        if (slots == -1).any():
            missing = np.flatnonzero(slots == -1)
            self.early.add([ids[i] for i in missing.tolist()], y[missing], p.arrivals,
                           marks[missing])
        oldest = self._oldest(float(marks[-1]))
        if oldest is not None:   # no later label can find these in time any more
            p.expire_before(oldest)
            self.early.expire(p.arrivals, oldest)
        if not found.any():
            return
        slots = slots[found]
        self.joined += len(slots)
        task = self.run.task
        y_found = y[found]
        pred = p.pred[slots]
        if task.name == "classification":
            y_found, pred = y_found.astype(np.int32), pred.astype(np.int32)
        batch = EncodedBatch(p.X[slots], y_found, p.lines[slots], "", p.times[slots],
                             None, [])
        last = self.run.last_time
        self.run.learn_stretch(batch, arrival=_Arrival(pred))
        self.run.last_time = last

    # -- counts and checkpoints --------------------------------------------------------
    def summary(self) -> dict:
        p, feed = self.pending, self.feed
        return {"window": self.window, "seconds": self.seconds,
                "read": feed.read if feed is not None else 0,
                "rejected": feed.rejected if feed is not None else 0,
                "joined": self.joined, "inline": self.inline,
                "expired": p.expired if p is not None else 0,
                "replaced": p.replaced if p is not None else 0,
                "no_id": self.no_id, "unmatched": self.early.unmatched,
                "waiting": len(p) if p is not None else 0, "early_waiting": len(self.early)}

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        """Meta (``labels_source``, ``labels``) and arrays (``labels.*``)."""
        self._ready()
        pending_meta, pending_arrays = self.pending.state()
        early_meta, early_arrays = self.early.state()
        feed_meta, feed_arrays = self.feed.state()
        arrays = {f"labels.pending.{k}": v for k, v in pending_arrays.items()}
        arrays.update({f"labels.early.{k}": v for k, v in early_arrays.items()})
        arrays.update({f"labels.feed.{k}": v for k, v in feed_arrays.items()})
        meta = {"labels_source": self.feed.position, "labels": {
            "watermark": self.watermark if math.isfinite(self.watermark) else None,
            "joined": self.joined, "inline": self.inline, "no_id": self.no_id,
            "pending": pending_meta, "early": early_meta, "feed": feed_meta}}
        return meta, arrays

    def restore(self, checkpoint) -> None:
        meta = checkpoint.meta
        labels = meta.get("labels")
        if labels is None:
            raise ConfigError(f"checkpoint {checkpoint.path!r} has no delayed-label state")
        self._ready()
        self.watermark = _NO_TIME if labels["watermark"] is None else labels["watermark"]
        self.joined, self.inline = int(labels["joined"]), int(labels["inline"])
        self.no_id = int(labels["no_id"])
        self.pending.restore(labels["pending"], checkpoint.arrays_under("labels.pending"))
        self.early.restore(labels["early"], checkpoint.arrays_under("labels.early"))
        self._restored = (meta, checkpoint.arrays_under("labels.feed"))

    def commit(self) -> None:
        if self.feed is not None and self.feed.position is not None:
            self.feed.source.commit(self.feed.position)


def _part(batch: EncodedBatch, part: slice) -> EncodedBatch:
    return EncodedBatch(batch.X[part], batch.y[part], batch.lines[part], batch.origin,
                        None if batch.times is None else batch.times[part],
                        None if batch.ids is None else batch.ids[part], [])
