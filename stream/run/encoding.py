"""Raw batches -> numeric arrays for the learner, with every bad value reported.

Inside: the :class:`EncodedBatch` the learner consumes and the stateful :class:`Encoder`
that assigns category and class codes in first-seen order and can be saved and restored.
What counts as missing, a number, a time or a label is :mod:`stream.run.values`; ``inf``
parses as a number but is refused here as "is not a finite number", and a number beyond
``stream.checks.VALUE_LIMIT`` (1e100) as "is beyond the learner's range": no split
statistic survives an infinite value or the square of a huge one.

Limitation: a column read with another dtype in a later chunk is handled, but a
category's code is fixed at first sight and never recycled.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pandas as pd

from connectors.base import RawBatch, Reject
from stream.checks import CATEGORY_LIMIT, VALUE_LIMIT, require_int
from stream.errors import ConfigError, ModelFileError
from stream.jit import njit

from stream.resolution import FINE, decimals_of
from .schema import Schema
from .values import (
    as_array,
    factorize_labels,
    label_texts,
    missing_mask,
    parse_numbers,
    parse_times,
)

_MAX_VALUE_CHARS = 200
_STATE_FORMAT = "sapwood-encoder"
_STATE_VERSION = 1

NOT_A_NUMBER = _REASON_NUMBER = "is not a number"
_REASON_FINITE = "is not a finite number"
_REASON_RANGE = f"is beyond the learner's range (magnitude above {VALUE_LIMIT:g})"
_REASON_TIME = "is not a time"
_REASON_NO_TARGET = "has no target value"
BEYOND_CLASS_CAP = "is a new class beyond the class cap"

#: Name of the code shared by a category field's values beyond its cap.
OTHER_VALUES = "(other values)"
#: Distinct values a category field keeps apart, and classes a target may have, unless
#: the run sets them (``--category-cap``, ``--class-cap``); at most CATEGORY_LIMIT.
DEFAULT_CATEGORY_CAP = 1000
DEFAULT_CLASS_CAP = 1000



# ---------------------------------------------------------------------------------------
# encoder
# ---------------------------------------------------------------------------------------

@dataclasses.dataclass
class EncodedBatch:
    """Records ready for the learner; rejected rows are already removed.

    Attributes
    ----------
    X
        float64 [n, F], C-contiguous, over ``schema.feature_names``; categories as codes,
        NaN for missing.
    y
        int32 class codes (classification) or float64 values (regression).
    lines
        int64 physical line of each kept row.
    origin
        Where the records came from (file name or ``-``).
    times
        float64 epoch seconds, or None when the schema has no time field.
    ids
        object array of str (``""`` when missing), or None when the schema has no id field.
    rejects
        The source's rejects followed by one entry per bad value of this batch.
    """

    X: np.ndarray
    y: np.ndarray
    lines: np.ndarray
    origin: str
    times: np.ndarray | None
    ids: np.ndarray | None
    rejects: list[Reject]

    def __len__(self) -> int:
        return len(self.y)


class _Codebook:
    """Label -> code in first-seen order; new labels get the next code.

    With a ``cap``, the first ``cap`` labels get codes 0..cap-1 and every later new
    label shares code ``cap``, shown as :data:`OTHER_VALUES`: each code costs memory in
    every leaf of the tree, so a field with ever more values (an identifier, a free
    text) must not grow without bound. ``pooled`` counts the rows given that code;
    ``first_pooled`` is the first label pooled (None before) and ``reached_at`` the
    number of rows with a value encoded before it.
    """

    def __init__(self, labels: list[str] | None = None, cap: int | None = None,
                 pooled: int = 0, first_pooled: str | None = None,
                 reached_at: int = 0) -> None:
        self.labels: list[str] = []
        self.codes: dict[str, int] = {}
        self.cap = cap
        self.pooled = pooled
        self.first_pooled = first_pooled
        self.reached_at = reached_at
        self.rows = 0
        for label in labels or []:
            self.add(label)

    @property
    def full(self) -> bool:
        return self.cap is not None and len(self.labels) >= self.cap

    def add(self, label: str) -> int:
        code = self.codes.get(label)
        if code is None:
            if self.full:
                if self.first_pooled is None:
                    self.first_pooled = label
                return len(self.labels)
            code = self.codes[label] = len(self.labels)
            self.labels.append(label)
        return code

    def shown(self) -> list[str]:
        """Labels in code order, with the shared code's name once values were pooled."""
        return self.labels + [OTHER_VALUES] if self.first_pooled is not None else \
            list(self.labels)

    def encode(self, codes: np.ndarray, labels: list[str | None],
               keep: np.ndarray) -> np.ndarray:
        """Map per-row codes into ``labels`` to codebook codes (-1 missing).

        New labels are added in the order their first *kept* row appears, so a rejected
        row never creates a code.
        """
        lut = np.full(len(labels) + 1, -1, dtype=np.int64)
        everything = bool(keep.all())
        if everything:    # factorize_labels numbers values in the order they first appear
            firsts = range(len(labels))
        else:
            kept = codes[keep]
            firsts = pd.unique(kept[kept >= 0])
        for unique in firsts:
            label = labels[unique]
            if label is not None:
                lut[unique] = self.add(label)
        mapped = lut[codes]  # -1 indexes the trailing -1
        present = mapped if everything else mapped[keep]
        present = present[present >= 0]
        if self.first_pooled is not None:
            in_pool = np.flatnonzero(present == len(self.labels))
            if not self.pooled and in_pool.size:
                self.reached_at = self.rows + int(in_pool[0])
            self.pooled += int(in_pool.size)
        self.rows += present.size
        return mapped


@dataclasses.dataclass
class PreparedColumns:
    """A batch's columns read for one schema, before any code is given: what
    :meth:`Encoder.encode` can do without the encoder's state, so that a reading thread
    can do it while the learner works on the previous batch."""

    batch: RawBatch
    schema: Schema
    scoring: bool
    X: np.ndarray                     # numeric features filled in, category columns not
    lines: np.ndarray
    problems: list[tuple[np.ndarray, str, str, Any]]
    bad_rows: np.ndarray
    pending: list[tuple[int, str, np.ndarray, list[str | None]]]   # category columns
    raw_target: Any
    target_codes: np.ndarray | None   # classification: codes of this batch's labels
    target_labels: list[str | None] | None
    y_values: np.ndarray | None       # regression
    times: np.ndarray | None
    ids: np.ndarray | None
    unknown_present: dict[str, int]   # values present per field outside the schema
    decimals: dict[str, int]          # per numeric feature, the decimals its values carry
    ranges: dict[str, tuple[float, float]]   # per numeric feature, its least and most value
    unknown_masks: dict[str, np.ndarray] | None = None   # where those values are (take)


    def take(self, rows: np.ndarray | slice, batch: RawBatch,
             settled: dict[str, int] | None = None,
             measure: bool = True) -> "PreparedColumns":
        """The columns of the records at ``rows`` (in that order), as :func:`prepare_columns`
        gives them for ``batch`` holding just those records: labels numbered anew in the
        order they first appear, decimals and ranges of these values (``settled``: the
        decimals an encoder holds; a field already finer than any count is not
        sampled again, as the most decimals seen is what is kept; ``measure=False``: none,
        for a reordering whose parts are taken again). A keyed run reads a window of
        records once and hands each key its part."""
        def part(values):
            return None if values is None else values[rows]

        problems = []
        for mask, field, reason, raw in self.problems:
            mine = mask[rows]
            if mine.any():
                problems.append((mine, field, reason, None if raw is None
                                 else as_array(raw)[rows]))
        # np.take gathers whole rows of a 2-D array several times faster than indexing
        # with an array (0.018 s against 0.07-0.11 s for 1M rows of 3 columns, measured)
        X = self.X[rows] if isinstance(rows, slice) else np.take(self.X, rows, axis=0)
        decimals: dict[str, int] = {}
        ranges: dict[str, tuple[float, float]] = {}
        if measure and not self.scoring and X.shape[0]:
            for j, (name, kind) in enumerate(zip(self.schema.feature_names,
                                                 self.schema.feature_kinds)):
                if kind == "numeric":
                    column = X[:, j]
                    decimals[name] = FINE if settled and settled.get(name) == FINE \
                        else decimals_of(column)
                    # one column at a time: a reduce along the rows of a row-major array
                    # is 4-7 times slower (measured)
                    span = _span(column)
                    if span is not None:
                        ranges[name] = span
        target_codes, target_labels = (None, None) if self.target_codes is None else \
            _renumbered(self.target_codes[rows], self.target_labels)
        masks = self.unknown_masks
        if masks is None:
            masks = {name: ~missing_mask(self.batch.frame[name])
                     for name in self.unknown_present}
        masks = {name: mask[rows] for name, mask in masks.items()}
        unknown = {name: int(np.count_nonzero(mask)) for name, mask in masks.items()}
        return PreparedColumns(
            batch, self.schema, self.scoring, X, self.lines[rows], problems,
            self.bad_rows[rows],
            [(j, name, *_renumbered(codes[rows], labels))
             for j, name, codes, labels in self.pending],
            None if self.raw_target is None else as_array(self.raw_target)[rows],
            target_codes, target_labels, part(self.y_values), part(self.times),
            part(self.ids), unknown, decimals, ranges, masks)


def _renumbered(codes: np.ndarray, labels: list) -> tuple[np.ndarray, list]:
    """Codes into ``labels`` numbered anew in the order they first appear in ``codes``
    (-1 stays), with the labels they keep: :func:`factorize_labels` of just these rows."""
    renumbered, present = _first_seen(np.ascontiguousarray(codes, dtype=np.int64),
                                      len(labels))
    return renumbered, [labels[c] for c in present.tolist()]


@njit
def _first_seen(codes, n_labels):   # pragma: no cover - compiled
    """Codes renumbered in order of first appearance, and the old code of each new one."""
    new = np.full(n_labels, -1, dtype=np.int64)
    present = np.empty(n_labels, dtype=np.int64)
    out = np.empty(codes.size, dtype=np.int64)
    k = 0
    for i in range(codes.size):
        c = codes[i]
        if c < 0:
            out[i] = -1
            continue
        if new[c] < 0:
            new[c] = k
            present[k] = c
            k += 1
        out[i] = new[c]
    return out, present[:k]


def prepare_columns(schema: Schema, batch: RawBatch, scoring: bool = False) -> PreparedColumns:
    """Read ``batch``'s columns for ``schema`` (numbers parsed, labels factorised, bad
    values found); pure, so it may run on another thread. See :meth:`Encoder.encode`."""
    frame = batch.frame
    n = len(frame)
    problems: list[tuple[np.ndarray, str, str, Any]] = []
    bad_rows = np.zeros(n, dtype=bool)

    def report(mask: np.ndarray, field: str, reason: str, raw: Any) -> None:
        nonlocal bad_rows
        if mask.any():
            problems.append((mask, field, reason, raw))
            bad_rows = bad_rows | mask

    def column(name: str) -> pd.Series | np.ndarray:
        if name in frame.columns:
            return frame[name]
        return np.full(n, np.nan)  # a key no record of this batch carried

    X = np.empty((n, len(schema.feature_names)))
    decimals: dict[str, int] = {}
    ranges: dict[str, tuple[float, float]] = {}
    pending: list[tuple[int, str, np.ndarray, list[str | None]]] = []
    for j, (name, kind) in enumerate(zip(schema.feature_names, schema.feature_kinds)):
        raw = column(name)
        if kind == "numeric":
            numbers, bad = parse_numbers(raw)
            report(bad, name, _REASON_NUMBER, raw)
            _report_unlearnable(numbers, report, name, raw)
            X[:, j] = numbers
            if not scoring:
                decimals[name] = decimals_of(numbers)
                span = _span(numbers)
                if span is not None:
                    ranges[name] = span
        else:
            codes, labels = factorize_labels(raw)
            pending.append((j, name, codes, labels))

    target = schema.target
    raw_target = column(target)
    target_codes = target_labels = y_values = None
    if schema.task == "classification":
        target_codes, target_labels = factorize_labels(raw_target)
        if not scoring:
            report(target_codes < 0, target, _REASON_NO_TARGET, None)
    else:
        y_values, bad = parse_numbers(raw_target)
        if scoring:
            y_values = np.where(np.abs(y_values) > VALUE_LIMIT, np.nan, y_values)
        else:
            report(bad, target, _REASON_NUMBER, raw_target)
            _report_unlearnable(y_values, report, target, raw_target)
            report(np.isnan(y_values) & ~bad, target, _REASON_NO_TARGET, None)

    times = None
    if schema.time_field is not None:
        raw_time = column(schema.time_field)
        times, bad = parse_times(raw_time)
        report(bad, schema.time_field, _REASON_TIME, raw_time)
    ids = None if schema.id_field is None else label_texts(column(schema.id_field))
    known = {field.name for field in schema.fields}
    unknown_present = {name: int(np.count_nonzero(~missing_mask(frame[name])))
                       for name in frame.columns if name not in known}
    return PreparedColumns(batch, schema, scoring, X, np.asarray(batch.lines, dtype=np.int64),
                           problems, bad_rows, pending, raw_target, target_codes,
                           target_labels, y_values, times, ids, unknown_present, decimals,
                           ranges)


class Encoder:
    """Turns :class:`RawBatch` objects into :class:`EncodedBatch` objects for one schema.

    Parameters
    ----------
    schema
        Fields, target and task.
    category_cap
        Distinct values each category field keeps apart; later new values share one
        code, :data:`OTHER_VALUES` (see :class:`_Codebook`).
    class_cap
        Classes the target may have; a record bringing one more is rejected with
        :data:`BEYOND_CLASS_CAP`.
    """

    def __init__(self, schema: Schema, category_cap: int = DEFAULT_CATEGORY_CAP,
                 class_cap: int = DEFAULT_CLASS_CAP) -> None:
        require_int("category cap", category_cap, 1)
        require_int("class cap", class_cap, 2)
        for what, cap in (("category cap", category_cap), ("class cap", class_cap)):
            if cap > CATEGORY_LIMIT:
                raise ConfigError(f"{what} must be at most {CATEGORY_LIMIT:,}, got {cap!r}")
        self.schema = schema
        self.category_cap = category_cap
        self._books = {name: _Codebook(cap=category_cap) for name, kind
                       in zip(schema.feature_names, schema.feature_kinds) if kind == "category"}
        self._classes = _Codebook(cap=class_cap)
        self.unknown_fields: dict[str, int] = {}
        self.decimals: dict[str, int] = {}   # numeric feature -> decimals its values carry
        self.ranges: dict[str, list[float]] = {}   # numeric feature -> [least, most] seen

    @property
    def classes(self) -> list[str]:
        """Class labels in code order (empty for regression)."""
        return list(self._classes.labels)

    def class_code(self, label: str) -> int | None:
        """The code of class ``label``, None if not seen yet."""
        return self._classes.codes.get(label)

    @property
    def categories(self) -> dict[str, list[str]]:
        """Category labels in code order, per category feature (with
        :data:`OTHER_VALUES` last once a field's values were pooled)."""
        return {name: book.shown() for name, book in self._books.items()}

    @property
    def class_cap(self) -> int:
        """Classes the target may have."""
        return int(self._classes.cap)

    @property
    def pooled(self) -> dict[str, dict]:
        """Per category field that reached its cap: the rows given the shared code and
        the first value pooled."""
        return {name: {"records": book.pooled, "first": book.first_pooled,
                       "after": book.reached_at}
                for name, book in self._books.items() if book.first_pooled is not None}

    def encode(self, batch: RawBatch, scoring: bool = False,
               prepared: "PreparedColumns | None" = None) -> EncodedBatch:
        """Encode one batch; the batch and its frame are left untouched.

        With ``scoring`` the target is optional (records are predicted, not learned): a
        missing or unreadable target gives y = -1 (classification) or NaN (regression)
        instead of a reject. ``prepared``: the batch's columns already read by
        :func:`prepare_columns` (on a reading thread) for this schema and ``scoring``;
        only the codes, which depend on what came before, are given here.
        """
        if prepared is None or prepared.batch is not batch or prepared.scoring != scoring \
                or (prepared.schema is not self.schema and prepared.schema != self.schema):
            prepared = prepare_columns(self.schema, batch, scoring)
        schema = self.schema
        X, lines, problems = prepared.X, prepared.lines, list(prepared.problems)
        bad_rows = prepared.bad_rows
        target = schema.target
        raw_target = prepared.raw_target

        def report(mask: np.ndarray, field: str, reason: str, raw: Any) -> None:
            nonlocal bad_rows
            if mask.any():
                problems.append((mask, field, reason, raw))
                bad_rows = bad_rows | mask

        keep = ~bad_rows
        if schema.task == "classification":
            y_codes = self._classes.encode(prepared.target_codes, prepared.target_labels, keep)
            beyond = keep & (y_codes >= self._classes.cap)
            if scoring:       # a label the model cannot know is as good as none
                y_codes = np.where(beyond, -1, y_codes)
            else:
                report(beyond, target,
                       f"{BEYOND_CLASS_CAP} ({self._classes.cap:,}; --class-cap)", raw_target)
            keep = ~bad_rows
            y = y_codes[keep].astype(np.int32)
        else:
            y = prepared.y_values[keep]
        for j, name, codes, labels in prepared.pending:
            mapped = self._books[name].encode(codes, labels, keep).astype(np.float64)
            mapped[mapped < 0] = np.nan
            X[:, j] = mapped

        ids = None if prepared.ids is None else prepared.ids[keep]
        for name, present in prepared.unknown_present.items():
            self.unknown_fields[name] = self.unknown_fields.get(name, 0) + present
        for name, places in prepared.decimals.items():
            self.decimals[name] = max(self.decimals.get(name, 0), places)
        for name, (lo, hi) in prepared.ranges.items():
            seen = self.ranges.setdefault(name, [lo, hi])
            seen[0], seen[1] = min(seen[0], lo), max(seen[1], hi)
        times = prepared.times
        everything = not bad_rows.any()
        return EncodedBatch(
            X=X if everything else X[keep],
            y=y,
            lines=lines.copy() if everything else lines[keep],
            origin=batch.origin,
            times=times if times is None or everything else times[keep],
            ids=ids,
            rejects=list(batch.rejects) + self._rejects(batch.origin, lines, problems),
        )

    def _rejects(self, origin: str, lines: np.ndarray,
                 problems: list[tuple[np.ndarray, str, str, Any]]) -> list[Reject]:
        found: list[tuple[int, int, Reject]] = []
        for order, (mask, field, reason, raw) in enumerate(problems):
            values = None if raw is None else as_array(raw)
            for row in np.flatnonzero(mask).tolist():
                value = None if values is None else str(values[row])[:_MAX_VALUE_CHARS]
                found.append((row, order, Reject(origin, int(lines[row]), field, value, reason)))
        found.sort(key=lambda item: item[:2])
        return [reject for _, _, reject in found]

    # -- saving and restoring ----------------------------------------------------------

    def state_dict(self) -> dict:
        """Codebooks and counters as a JSON-able dict."""
        return {
            "format": _STATE_FORMAT,
            "version": _STATE_VERSION,
            "task": self.schema.task,
            "categories": {name: list(book.labels) for name, book in self._books.items()},
            "classes": self.classes,
            "category_cap": self.category_cap,
            "class_cap": self.class_cap,
            "pooled": {name: [book.pooled, book.first_pooled, book.reached_at]
                       for name, book in self._books.items() if book.first_pooled is not None},
            "unknown_fields": dict(self.unknown_fields),
            "decimals": dict(self.decimals),
            "ranges": {name: list(span) for name, span in self.ranges.items()},
        }

    @classmethod
    def from_state(cls, schema: Schema, state: dict) -> "Encoder":
        """Rebuild an encoder saved by :meth:`state_dict` for the same schema."""
        def fail(why: str) -> ModelFileError:
            return ModelFileError(f"saved encoder state does not fit the schema: {why}")

        if not isinstance(state, dict) or state.get("format") != _STATE_FORMAT:
            raise fail("it is not an encoder state")
        if state.get("version") != _STATE_VERSION:
            raise fail(f"version {state.get('version')!r}, expected {_STATE_VERSION}")
        if state.get("task") != schema.task:
            raise fail(f"task {state.get('task')!r}, the schema's is {schema.task!r}")
        # states saved before the caps existed kept every value apart
        category_cap = state.get("category_cap", CATEGORY_LIMIT)
        class_cap = state.get("class_cap", CATEGORY_LIMIT)
        try:
            encoder = cls(schema, category_cap, class_cap)
        except ConfigError as exc:
            raise fail(str(exc)) from None
        categories = state.get("categories")
        if not isinstance(categories, dict) or set(categories) != set(encoder._books):
            expected = ", ".join(sorted(encoder._books)) or "none"
            raise fail(f"category fields differ (expected {expected})")
        pooled = state.get("pooled", {})
        if not isinstance(pooled, dict) or not set(pooled) <= set(encoder._books):
            raise fail("pooled names fields that are not category fields")
        for name, labels in categories.items():
            facts = pooled.get(name, [0, None, 0])
            if not (isinstance(facts, list) and len(facts) == 3
                    and all(isinstance(v, int) and v >= 0 for v in facts[::2])
                    and (facts[1] is None or isinstance(facts[1], str))):
                raise fail(f"pooled values of field {name!r} are not a count, a label "
                           "and a count")
            labels = _label_list(labels, fail, f"field {name!r}")
            if len(labels) > category_cap:
                raise fail(f"field {name!r} lists more values than its cap")
            encoder._books[name] = _Codebook(labels, category_cap, *facts)
        classes = _label_list(state.get("classes"), fail, "classes")
        if len(classes) > class_cap:
            raise fail("more classes than the class cap")
        encoder._classes = _Codebook(classes, class_cap)
        unknown = state.get("unknown_fields", {})
        if not isinstance(unknown, dict):
            raise fail("unknown_fields is not an object")
        encoder.unknown_fields = {str(k): int(v) for k, v in unknown.items()}
        decimals = state.get("decimals", {})  # absent in states written before
        if not isinstance(decimals, dict) or not all(
                isinstance(v, int) and 0 <= v <= FINE for v in decimals.values()):
            raise fail("decimals is not an object of whole numbers 0.." + str(FINE))
        encoder.decimals = {str(k): int(v) for k, v in decimals.items()}
        ranges = state.get("ranges", {})  # absent in states written before
        if not isinstance(ranges, dict) or not all(
                isinstance(v, list) and len(v) == 2 and all(isinstance(x, (int, float))
                                                            for x in v)
                for v in ranges.values()):
            raise fail("ranges is not an object of [least, most] pairs")
        encoder.ranges = {str(k): [float(v[0]), float(v[1])] for k, v in ranges.items()}
        return encoder


def _span(numbers: np.ndarray) -> tuple[float, float] | None:
    """Least and most learnable value of a column (None when it has none)."""
    if numbers.size == 0:
        return None
    lo, hi = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
    if not (abs(lo) <= VALUE_LIMIT and abs(hi) <= VALUE_LIMIT):  # NaN-only, inf or huge
        kept = numbers[np.abs(numbers) <= VALUE_LIMIT]
        if kept.size == 0:
            return None
        lo, hi = kept.min(), kept.max()
    return float(lo), float(hi)


def _report_unlearnable(numbers: np.ndarray, report, name: str, raw: Any) -> None:
    """Report infinite values and finite ones beyond ``VALUE_LIMIT`` (NaN passes)."""
    with np.errstate(invalid="ignore"):
        huge = np.abs(numbers) > VALUE_LIMIT
    if huge.any():
        infinite = np.isinf(numbers)
        report(infinite, name, _REASON_FINITE, raw)
        report(huge & ~infinite, name, _REASON_RANGE, raw)


def _label_list(labels: Any, fail, what: str) -> list[str]:
    if not isinstance(labels, list) or not all(isinstance(x, str) for x in labels):
        raise fail(f"{what} is not a list of labels")
    if len(set(labels)) != len(labels):
        raise fail(f"{what} lists a label twice")
    return labels
