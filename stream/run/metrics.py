"""Prequential (test-then-train) evaluation kept while the stream runs.

Contents
--------
ClassificationScore(window, fading, log_every, concern_after)
    Accuracy, Cohen's kappa, kappa-M, balanced accuracy, per-class precision / recall /
    F1 and the confusion matrix, each cumulative and over a sliding window of the last
    ``window`` records; fading-factor accuracy; precision, recall and F1 of the class of
    concern (declared, or the rarest class among the first ``concern_after`` labels).
RegressionScore(window, fading, log_every)
    MAE, RMSE and R^2, cumulative and over the sliding window; fading-factor MAE.

Both take, per batch, the true and predicted values of records the learner scored
*before* learning from them, and return one log row for each multiple of ``log_every``
reached inside the batch. A row is computed at exactly that record, so rows and results
do not depend on how the stream is cut into batches. The record loop is compiled
(numba); a log row costs O(classes) for classification and O(window) for regression.

Definitions
-----------
- Cohen's kappa: (p0 - pc) / (1 - pc), pc = sum_k (true_k / n) (pred_k / n).
- kappa-M (Bifet et al., KDD 2015): (p0 - pm) / (1 - pm), pm the prequential accuracy of
  the majority-class predictor, which predicts the class most frequent among the true
  labels seen *before* the record (ties, and the very first record, go to the lowest
  code). The windowed kappa-M scores that same predictor over the window's records.
- Balanced accuracy: mean recall over the classes with at least one true record.
- Class of concern: the class the operator watches (a fault, an alarm, a reject). If not
  declared, the rarest class among the first ``concern_after`` labels (ties to the lowest
  code), chosen at exactly that label whatever the batches, and kept from then on. Its
  columns in log rows are None before it is known.
- F1 of a class: 2 tp / (2 tp + fp + fn), which equals 2PR / (P + R) where both exist.
- Fading factor (Gama, Sebastiao & Rodrigues, Machine Learning 2013):
  S_i = L_i + a S_{i-1}, N_i = 1 + a N_{i-1}, P_i = S_i / N_i.
- R^2: 1 - SSE / SST, SST from Welford's running variance of the true values
  (cumulative) or a two-pass sum over the window's records (windowed).

Undefined values (no records, kappa with pc == 1, R^2 with constant targets, the
precision of a class never predicted) are ``None`` in rows and results, never NaN.

State for checkpoints: ``state_dict()`` returns plain values and numpy arrays only (no
pickle); ``from_state`` restores it exactly, so a resumed run equals an uninterrupted one.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

import numpy as np

from stream.checks import require_float, require_int
from stream.errors import ModelFileError
from stream.jit import njit

__all__ = ["ClassificationScore", "RegressionScore"]

_STATE_VERSION = 1

CLASSIFICATION_ROW = ("records", "accuracy", "kappa", "kappa_m", "balanced_accuracy",
                      "window_accuracy", "window_kappa", "window_kappa_m",
                      "window_balanced_accuracy", "fading_accuracy",
                      "concern_precision", "concern_recall", "concern_f1",
                      "window_concern_precision", "window_concern_recall", "window_concern_f1")
"""Keys of a classification log row, in the column order of the compiled kernel."""

CONCERN_AFTER = 1000
"""Labels seen before the rarest class becomes the class of concern (when none is declared)."""

REGRESSION_ROW = ("records", "mae", "rmse", "r2", "window_mae", "window_rmse", "window_r2",
                  "fading_mae")
"""Keys of a regression log row, in the column order of the compiled kernel."""


# --------------------------------------------------------------------------------------
# Compiled kernels. Division guards are explicit: the project's error model is numpy's,
# and an undefined value must come out as NaN (turned into None at the edge), not inf.
# --------------------------------------------------------------------------------------

@njit(cache=True)
def _class_headline(cm, true_n, pred_n, correct, majority_hits, n, dest, at):
    """Write accuracy, kappa, kappa-M and balanced accuracy into dest[at:at + 4]."""
    nan = np.nan
    if n == 0:
        for j in range(4):
            dest[at + j] = nan
        return
    total = float(n)
    p0 = correct / total
    pc = 0.0
    recall_sum = 0.0
    seen = 0
    for k in range(true_n.shape[0]):
        pc += (true_n[k] / total) * (pred_n[k] / total)
        if true_n[k] > 0:
            recall_sum += cm[k, k] / float(true_n[k])
            seen += 1
    pm = majority_hits / total
    dest[at] = p0
    dest[at + 1] = (p0 - pc) / (1.0 - pc) if pc < 1.0 else nan
    dest[at + 2] = (p0 - pm) / (1.0 - pm) if pm < 1.0 else nan
    dest[at + 3] = recall_sum / seen


@njit(cache=True)
def _class_focus(cm, true_n, pred_n, c, dest, at):
    """Write precision, recall and F1 of class ``c`` into dest[at:at + 3] (NaN if undefined)."""
    nan = np.nan
    if c < 0 or c >= true_n.shape[0]:
        for j in range(3):
            dest[at + j] = nan
        return
    tp = float(cm[c, c])
    support = float(true_n[c])
    predicted = float(pred_n[c])
    dest[at] = tp / predicted if predicted > 0 else nan
    dest[at + 1] = tp / support if support > 0 else nan
    dest[at + 2] = 2.0 * tp / (support + predicted) if support + predicted > 0 else nan


@njit(cache=True)
def _classification_pass(y, p, cm, true_n, pred_n, wcm, wtrue_n, wpred_n,
                         ring_y, ring_p, ring_m, counts, fade, a, log_every, out,
                         concern, concern_from):
    """Score records y[i] vs p[i] one at a time, writing a row into ``out`` at log points.

    counts: [records, correct, majority class, majority hits, ring position,
    window correct, window majority hits]; fade: [S, N]. Rows at records before
    ``concern_from`` leave the class of concern's columns undefined.
    """
    width = ring_y.shape[0]
    n = counts[0]
    correct = counts[1]
    majority = counts[2]
    majority_hits = counts[3]
    pos = counts[4]
    wcorrect = counts[5]
    wmajority_hits = counts[6]
    s = fade[0]
    norm = fade[1]
    row = 0
    for i in range(y.shape[0]):
        t = y[i]
        q = p[i]
        hit = 1 if t == q else 0
        # The majority predictor is scored before it sees this record's label.
        mhit = 1 if t == majority else 0
        true_n[t] += 1
        if q >= 0:  # -1: the learner had no class to predict yet (counted as wrong)
            cm[t, q] += 1
            pred_n[q] += 1
        correct += hit
        majority_hits += mhit
        # Only true_n[t] grew, so the new majority is the old one or t.
        if true_n[t] > true_n[majority] or (true_n[t] == true_n[majority] and t < majority):
            majority = t
        if n >= width:
            ot = ring_y[pos]
            oq = ring_p[pos]
            wtrue_n[ot] -= 1
            if oq >= 0:
                wcm[ot, oq] -= 1
                wpred_n[oq] -= 1
            if ot == oq:
                wcorrect -= 1
            wmajority_hits -= ring_m[pos]
        ring_y[pos] = t
        ring_p[pos] = q
        ring_m[pos] = mhit
        wtrue_n[t] += 1
        if q >= 0:
            wcm[t, q] += 1
            wpred_n[q] += 1
        wcorrect += hit
        wmajority_hits += mhit
        pos += 1
        if pos == width:
            pos = 0
        n += 1
        s = hit + a * s
        norm = 1.0 + a * norm
        if log_every > 0 and n % log_every == 0:
            dest = out[row]
            dest[0] = n
            _class_headline(cm, true_n, pred_n, correct, majority_hits, n, dest, 1)
            _class_headline(wcm, wtrue_n, wpred_n, wcorrect, wmajority_hits,
                            min(n, width), dest, 5)
            dest[9] = s / norm
            c = concern if n >= concern_from else -1
            _class_focus(cm, true_n, pred_n, c, dest, 10)
            _class_focus(wcm, wtrue_n, wpred_n, c, dest, 13)
            row += 1
    counts[0] = n
    counts[1] = correct
    counts[2] = majority
    counts[3] = majority_hits
    counts[4] = pos
    counts[5] = wcorrect
    counts[6] = wmajority_hits
    fade[0] = s
    fade[1] = norm


@njit(cache=True)
def _regression_window(ring_y, ring_p, filled, dest, at):
    """Write window MAE, RMSE and R^2 into dest[at:at + 3], summing the ring afresh.

    Summing afresh (O(window)) instead of adding and subtracting keeps one huge error from
    leaving rounding residue in the window sums after it has left the window.
    """
    nan = np.nan
    if filled == 0:
        for j in range(3):
            dest[at + j] = nan
        return
    total = float(filled)
    sum_y = 0.0
    abs_err = 0.0
    sq_err = 0.0
    for j in range(filled):
        e = ring_y[j] - ring_p[j]
        sum_y += ring_y[j]
        abs_err += abs(e)
        sq_err += e * e
    mean_y = sum_y / total
    sst = 0.0
    for j in range(filled):
        d = ring_y[j] - mean_y
        sst += d * d
    dest[at] = abs_err / total
    dest[at + 1] = math.sqrt(sq_err / total)
    dest[at + 2] = 1.0 - sq_err / sst if sst > 0.0 else nan


@njit(cache=True)
def _regression_headline(n, sums, dest, at):
    """Write cumulative MAE, RMSE and R^2 into dest[at:at + 3]; sums as in the pass."""
    nan = np.nan
    if n == 0:
        for j in range(3):
            dest[at + j] = nan
        return
    total = float(n)
    dest[at] = sums[0] / total
    dest[at + 1] = math.sqrt(sums[1] / total)
    dest[at + 2] = 1.0 - sums[1] / sums[3] if sums[3] > 0.0 else nan


@njit(cache=True)
def _regression_pass(y, p, ring_y, ring_p, counts, sums, a, log_every, out):
    """Score records one at a time, writing a row into ``out`` at log points.

    counts: [records, ring position]; sums: [sum |e|, sum e^2, mean y, M2 y, S, N].
    """
    width = ring_y.shape[0]
    n = counts[0]
    pos = counts[1]
    row = 0
    for i in range(y.shape[0]):
        t = y[i]
        e = t - p[i]
        ae = abs(e)
        sums[0] += ae
        sums[1] += e * e
        n += 1
        # Welford's update of the mean and the sum of squared deviations of y.
        d = t - sums[2]
        sums[2] += d / n
        sums[3] += d * (t - sums[2])
        sums[4] = ae + a * sums[4]
        sums[5] = 1.0 + a * sums[5]
        ring_y[pos] = t
        ring_p[pos] = p[i]
        pos += 1
        if pos == width:
            pos = 0
        if log_every > 0 and n % log_every == 0:
            dest = out[row]
            dest[0] = n
            _regression_headline(n, sums, dest, 1)
            _regression_window(ring_y, ring_p, min(n, width), dest, 4)
            dest[7] = sums[4] / sums[5]
            row += 1
    counts[0] = n
    counts[1] = pos


# --------------------------------------------------------------------------------------
# Edge: validation, growth, JSON conversion, state.
# --------------------------------------------------------------------------------------

def _number(value: float) -> float | None:
    """A JSON-safe float: NaN and infinities become None."""
    value = float(value)
    return value if math.isfinite(value) else None


def _row(keys: tuple, values: np.ndarray) -> dict:
    row = {key: _number(v) for key, v in zip(keys[1:], values[1:])}
    return {"records": int(values[0]), **row}


def _log_rows_due(before: int, count: int, log_every: int) -> int:
    if log_every == 0:
        return 0
    return (before + count) // log_every - before // log_every


def _pair(y: Any, pred: Any, first_record: int) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y)
    pred = np.asarray(pred)
    if y.ndim != 1 or pred.ndim != 1 or y.shape[0] != pred.shape[0]:
        raise ValueError(f"records {first_record}..: true values {y.shape} and predictions "
                         f"{pred.shape} must be 1-D arrays of the same length")
    return y, pred


def _check_codes(what: str, codes: np.ndarray, n_classes: int, first_record: int,
                 lowest: int = 0) -> np.ndarray:
    if codes.dtype.kind not in "iu":
        raise ValueError(f"{what} class codes must be integers, got dtype {codes.dtype}")
    if codes.size and (codes.min() < lowest or codes.max() >= n_classes):
        i = int(np.flatnonzero((codes < lowest) | (codes >= n_classes))[0])
        raise ValueError(f"record {first_record + i}: {what} class code {codes[i]} is "
                         f"outside 0..{n_classes - 1}")
    return np.ascontiguousarray(codes, dtype=np.int32)


def _check_values(what: str, values: np.ndarray, first_record: int) -> np.ndarray:
    if values.dtype.kind not in "iuf":
        raise ValueError(f"{what} must be numbers, got dtype {values.dtype}")
    values = np.ascontiguousarray(values, dtype=np.float64)
    finite = np.isfinite(values)
    if not finite.all():
        i = int(np.flatnonzero(~finite)[0])
        raise ValueError(f"record {first_record + i}: {what} {float(values[i])!r} is not a "
                         "finite number")
    return values


def _settings(window: Any, fading: Any, log_every: Any) -> tuple[int, float, int]:
    return (require_int("window", window, 1),
            require_float("fading factor", fading, 0.0, 1.0, high_open=False),
            require_int("log interval", log_every, 0))


def _field(state: Mapping, name: str) -> Any:
    try:
        return state[name]
    except (KeyError, TypeError):
        raise ModelFileError(f"metrics state: field {name!r} is missing") from None


def _scalar(state: Mapping, name: str, kind: type) -> Any:
    value = _field(state, name)
    try:
        return kind(np.asarray(value).item())
    except (TypeError, ValueError):
        raise ModelFileError(f"metrics state: field {name!r}: {value!r} is not a "
                             f"{kind.__name__}") from None


def _array(state: Mapping, name: str, dtype: type, shape: tuple) -> np.ndarray:
    value = np.asarray(_field(state, name))
    if value.shape != shape or not np.can_cast(value.dtype, dtype, casting="same_kind"):
        raise ModelFileError(f"metrics state: field {name!r} has shape {value.shape} and "
                             f"dtype {value.dtype}, expected {shape} and {np.dtype(dtype)}")
    return np.array(value, dtype=dtype)  # a copy: the restored scorer owns its arrays


def _check_kind(state: Mapping, kind: str) -> None:
    found = str(np.asarray(_field(state, "kind")).item())
    version = _scalar(state, "version", int)
    if found != kind or version != _STATE_VERSION:
        raise ModelFileError(f"metrics state is {found!r} version {version}, expected "
                             f"{kind!r} version {_STATE_VERSION}")


def _confusion_of(codes_y: np.ndarray, codes_p: np.ndarray, n_classes: int) -> np.ndarray:
    cm = np.zeros((n_classes, n_classes), dtype=np.int64)
    scored = codes_p >= 0  # -1: no prediction, in no column
    np.add.at(cm, (codes_y[scored].astype(np.intp), codes_p[scored].astype(np.intp)), 1)
    return cm


def rarest_class(counts: np.ndarray) -> int:
    """Code of the least frequent class among those seen (count > 0); ties go to the
    lowest code; 0 when none is seen."""
    counts = np.asarray(counts)
    seen = np.flatnonzero(counts > 0)
    if seen.size == 0:
        return 0
    return int(seen[np.argmin(counts[seen])])


def _per_class(cm: np.ndarray, labels: list[str]) -> dict:
    """precision, recall, F1 and support per label; None where the ratio is undefined."""
    out = {}
    for k, label in enumerate(labels):
        tp = int(cm[k, k])
        support = int(cm[k, :].sum())
        predicted = int(cm[:, k].sum())
        out[label] = {
            "precision": tp / predicted if predicted else None,
            "recall": tp / support if support else None,
            "f1": 2 * tp / (support + predicted) if support + predicted else None,
            "support": support,
        }
    return out



def _padded(a: np.ndarray, extra: int) -> np.ndarray:
    """``a`` (a vector or a square matrix) with ``extra`` more zero rows (and columns);
    what ``np.pad`` does, without its cost on small arrays."""
    if a.ndim == 1:
        out = np.zeros(a.shape[0] + extra, dtype=a.dtype)
        out[:a.shape[0]] = a
    else:
        n = a.shape[0]
        out = np.zeros((n + extra, n + extra), dtype=a.dtype)
        out[:n, :n] = a
    return out

class ClassificationScore:
    """Prequential classification metrics over integer class codes.

    Parameters
    ----------
    window
        Records in the sliding window (the last ``window`` records).
    fading
        Fading factor a in (0, 1] of the fading accuracy; 1 gives the plain mean.
    log_every
        Emit a log row every this many records; 0 for none.
    concern_after
        Labels after which the rarest class so far becomes the class of concern, unless
        :meth:`declare_concern` named one first; 0: only a declared class.

    Examples
    --------
    >>> import numpy as np
    >>> score = ClassificationScore(window=4, log_every=3)
    >>> rows = score.update(np.array([0, 1, 1, 0], np.int32), np.array([0, 1, 0, 0], np.int32), 2)
    >>> [(r["records"], round(r["accuracy"], 4)) for r in rows]
    [(3, 0.6667)]
    >>> score.result(["ok", "fault"])["confusion"]["matrix"]
    [[2, 0], [1, 1]]
    """

    def __init__(self, window: int = 1000, fading: float = 0.999, log_every: int = 0,
                 concern_after: int = CONCERN_AFTER) -> None:
        self.window, self.fading, self.log_every = _settings(window, fading, log_every)
        self.concern_after = require_int("labels before choosing the class of concern",
                                         concern_after, 0)
        self.concern = -1        # class code of concern; -1 while not known
        self.concern_from = 0    # first record whose log row carries the concern's figures
        self.n_classes_ = 0
        self.cm_ = np.zeros((0, 0), dtype=np.int64)
        self.window_cm_ = np.zeros((0, 0), dtype=np.int64)
        self._true_n = np.zeros(0, dtype=np.int64)
        self._pred_n = np.zeros(0, dtype=np.int64)
        self._wtrue_n = np.zeros(0, dtype=np.int64)
        self._wpred_n = np.zeros(0, dtype=np.int64)
        self._ring_y = np.zeros(self.window, dtype=np.int32)
        self._ring_p = np.zeros(self.window, dtype=np.int32)
        self._ring_m = np.zeros(self.window, dtype=np.uint8)
        self._counts = np.zeros(7, dtype=np.int64)
        self._fade = np.zeros(2, dtype=np.float64)

    @property
    def records(self) -> int:
        """Records scored so far."""
        return int(self._counts[0])

    def _grow(self, n_classes: int) -> None:
        extra = n_classes - self.n_classes_
        if extra <= 0:
            return
        self.cm_ = _padded(self.cm_, extra)
        self.window_cm_ = _padded(self.window_cm_, extra)
        self._true_n, self._pred_n, self._wtrue_n, self._wpred_n = (
            _padded(a, extra) for a in (self._true_n, self._pred_n,
                                        self._wtrue_n, self._wpred_n))
        self.n_classes_ = n_classes

    def update(self, y: np.ndarray, pred: np.ndarray, n_classes: int) -> list[dict]:
        """Score a batch: true codes ``y`` against predicted codes ``pred``.

        Parameters
        ----------
        y, pred
            1-D integer arrays of class codes in ``0 .. n_classes - 1``, in stream order;
            a prediction of -1 means "no class yet" and counts as wrong.
        n_classes
            Classes the learner knows now; may grow between calls.

        Returns
        -------
        list of dict
            One row per multiple of ``log_every`` reached in this batch, with the keys of
            :data:`CLASSIFICATION_ROW`.
        """
        first = self.records + 1
        y, pred = _pair(y, pred, first)
        if isinstance(n_classes, np.integer):  # learners often hold counts as numpy ints
            n_classes = int(n_classes)
        n_classes = require_int("number of classes", n_classes, 1)
        y = _check_codes("true", y, n_classes, first)
        pred = _check_codes("predicted", pred, n_classes, first, lowest=-1)
        self._grow(n_classes)
        self._choose_concern(y)
        out = np.empty((_log_rows_due(self.records, y.shape[0], self.log_every),
                        len(CLASSIFICATION_ROW)))
        if y.shape[0]:
            _classification_pass(y, pred, self.cm_, self._true_n, self._pred_n,
                                 self.window_cm_, self._wtrue_n, self._wpred_n,
                                 self._ring_y, self._ring_p, self._ring_m,
                                 self._counts, self._fade, self.fading, self.log_every, out,
                                 self.concern, self.concern_from)
        return [_row(CLASSIFICATION_ROW, values) for values in out]

    def declare_concern(self, code: int) -> None:
        """Make class ``code`` the class of concern from the next record on (a declared
        class, once it has a code); a class already of concern stays."""
        code = require_int("class of concern", code, 0)
        if self.concern < 0:
            self.concern = code
            self.concern_from = self.records + 1

    def _choose_concern(self, y: np.ndarray) -> None:
        """The rarest class among the first ``concern_after`` labels, at exactly that label
        (so the choice and the log rows do not depend on how the stream is batched)."""
        if self.concern >= 0 or self.concern_after == 0 \
                or self.records + y.shape[0] < self.concern_after:
            return
        upto = max(self.concern_after - self.records, 0)
        counts = self._true_n + np.bincount(y[:upto], minlength=self.n_classes_)
        self.concern = rarest_class(counts)
        self.concern_from = max(self.concern_after, self.records + 1)

    def _headline(self) -> np.ndarray:
        c = self._counts
        values = np.empty(len(CLASSIFICATION_ROW))
        values[0] = c[0]
        _class_headline(self.cm_, self._true_n, self._pred_n, c[1], c[3], c[0], values, 1)
        _class_headline(self.window_cm_, self._wtrue_n, self._wpred_n, c[5], c[6],
                        min(c[0], self.window), values, 5)
        values[9] = self._fade[0] / self._fade[1] if c[0] else np.nan
        _class_focus(self.cm_, self._true_n, self._pred_n, self.concern, values, 10)
        _class_focus(self.window_cm_, self._wtrue_n, self._wpred_n, self.concern, values, 13)
        return values

    def result(self, labels: Sequence[str]) -> dict:
        """All metrics now, JSON-able; ``labels[k]`` names class code k.

        ``labels`` may name more classes than have been seen; they count with zeros.
        """
        labels = [str(label) for label in labels]
        if len(labels) < self.n_classes_ or len(set(labels)) != len(labels):
            raise ValueError(f"labels must name the {self.n_classes_} class codes seen, "
                             f"each once; got {labels!r}")
        extra = len(labels) - self.n_classes_
        cm = _padded(self.cm_, extra)
        wcm = _padded(self.window_cm_, extra)
        out = _row(CLASSIFICATION_ROW, self._headline())
        out["window_records"] = min(self.records, self.window)
        out["concern"] = labels[self.concern] if 0 <= self.concern < len(labels) else None
        out["per_class"] = _per_class(cm, labels)
        out["confusion"] = {"labels": labels, "matrix": cm.tolist()}
        out["window_per_class"] = _per_class(wcm, labels)
        out["window_confusion"] = {"labels": labels, "matrix": wcm.tolist()}
        return out

    def state_dict(self) -> dict:
        """Plain values and numpy arrays (copies) that :meth:`from_state` restores exactly.

        Window counts, marginals and the majority class are derived on restore.
        """
        c = self._counts
        return {
            "kind": "classification_score", "version": _STATE_VERSION,
            "window": self.window, "fading": self.fading, "log_every": self.log_every,
            "n_classes": self.n_classes_, "records": int(c[0]),
            "majority_hits": int(c[3]),
            "fading_sum": float(self._fade[0]), "fading_count": float(self._fade[1]),
            "confusion": self.cm_.copy(), "true_counts": self._true_n.copy(),
            "ring_true": self._ring_y.copy(), "ring_pred": self._ring_p.copy(),
            "ring_majority_hit": self._ring_m.copy(),
            "concern": self.concern, "concern_from": self.concern_from,
            "concern_after": self.concern_after,
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> "ClassificationScore":
        """Rebuild a scorer from :meth:`state_dict` output (also as loaded from .npz)."""
        _check_kind(state, "classification_score")
        score = cls(_scalar(state, "window", int), _scalar(state, "fading", float),
                    _scalar(state, "log_every", int),
                    _scalar(state, "concern_after", int) if "concern_after" in state
                    else CONCERN_AFTER)  # states written before the class of concern
        k = _scalar(state, "n_classes", int)
        if "concern" in state:
            score.concern = _scalar(state, "concern", int)
            score.concern_from = _scalar(state, "concern_from", int)
            if score.concern >= max(k, 1) or score.concern < -1:
                raise ModelFileError(f"metrics state: class of concern {score.concern} is "
                                     f"not one of the {k} classes")
        n = _scalar(state, "records", int)
        w = score.window
        filled = min(n, w)
        score._grow(k)
        score.cm_ = _array(state, "confusion", np.int64, (k, k))
        score._ring_y = _array(state, "ring_true", np.int32, (w,))
        score._ring_p = _array(state, "ring_pred", np.int32, (w,))
        score._ring_m = _array(state, "ring_majority_hit", np.uint8, (w,))
        ry, rp = score._ring_y[:filled], score._ring_p[:filled]
        # records the learner could not yet predict (-1) are in true_counts, not in cm
        true_n = _array(state, "true_counts", np.int64, (k,)) if "true_counts" in state \
            else score.cm_.sum(axis=1)
        if (n < 0 or int(true_n.sum()) != n or (true_n < score.cm_.sum(axis=1)).any()
                or cls._bad_codes(ry, k) or cls._bad_codes(rp, k, lowest=-1)):
            raise ModelFileError(f"metrics state: confusion matrix, ring and record count "
                                 f"({n}) do not agree")
        score.window_cm_ = _confusion_of(ry, rp, k)
        score._true_n = true_n
        score._pred_n = score.cm_.sum(axis=0)
        score._wtrue_n = np.bincount(ry, minlength=k).astype(np.int64)
        score._wpred_n = score.window_cm_.sum(axis=0)
        # argmax takes the first maximum, i.e. the lowest code, as the kernel does.
        majority = int(np.argmax(score._true_n)) if k else 0
        score._counts[:] = (n, np.trace(score.cm_), majority,
                            _scalar(state, "majority_hits", int), n % w,
                            np.trace(score.window_cm_), int(score._ring_m[:filled].sum()))
        score._fade[:] = (_scalar(state, "fading_sum", float),
                          _scalar(state, "fading_count", float))
        return score

    @staticmethod
    def _bad_codes(codes: np.ndarray, n_classes: int, lowest: int = 0) -> bool:
        return bool(codes.size) and bool(codes.min() < lowest or codes.max() >= n_classes)


class RegressionScore:
    """Prequential regression metrics: MAE, RMSE, R^2, cumulative and windowed; fading MAE.

    Parameters
    ----------
    window
        Records in the sliding window (the last ``window`` records).
    fading
        Fading factor a in (0, 1] of the fading MAE; 1 gives the plain mean.
    log_every
        Emit a log row every this many records; 0 for none.

    Examples
    --------
    >>> import numpy as np
    >>> score = RegressionScore(window=2)
    >>> score.update(np.array([1.0, 2.0, 4.0]), np.array([1.5, 2.0, 3.0]))
    []
    >>> r = score.result()
    >>> round(r["mae"], 4), r["window_mae"], round(r["r2"], 4)
    (0.5, 0.5, 0.7321)
    """

    def __init__(self, window: int = 1000, fading: float = 0.999, log_every: int = 0) -> None:
        self.window, self.fading, self.log_every = _settings(window, fading, log_every)
        self._ring_y = np.zeros(self.window, dtype=np.float64)
        self._ring_p = np.zeros(self.window, dtype=np.float64)
        self._counts = np.zeros(2, dtype=np.int64)
        self._sums = np.zeros(6, dtype=np.float64)

    @property
    def records(self) -> int:
        """Records scored so far."""
        return int(self._counts[0])

    def update(self, y: np.ndarray, pred: np.ndarray) -> list[dict]:
        """Score a batch of true values ``y`` against predictions ``pred`` (finite floats).

        Returns one row per multiple of ``log_every`` reached in this batch, with the keys
        of :data:`REGRESSION_ROW`.
        """
        first = self.records + 1
        y, pred = _pair(y, pred, first)
        y = _check_values("true value", y, first)
        pred = _check_values("prediction", pred, first)
        out = np.empty((_log_rows_due(self.records, y.shape[0], self.log_every),
                        len(REGRESSION_ROW)))
        if y.shape[0]:
            _regression_pass(y, pred, self._ring_y, self._ring_p, self._counts, self._sums,
                             self.fading, self.log_every, out)
        return [_row(REGRESSION_ROW, values) for values in out]

    def result(self) -> dict:
        """All metrics now, JSON-able (undefined values are None)."""
        n = self.records
        values = np.empty(len(REGRESSION_ROW))
        values[0] = n
        _regression_headline(n, self._sums, values, 1)
        _regression_window(self._ring_y, self._ring_p, min(n, self.window), values, 4)
        values[7] = self._sums[4] / self._sums[5] if n else np.nan
        out = _row(REGRESSION_ROW, values)
        out["window_records"] = min(n, self.window)
        return out

    def state_dict(self) -> dict:
        """Plain values and numpy arrays (copies) that :meth:`from_state` restores exactly."""
        s = self._sums
        return {
            "kind": "regression_score", "version": _STATE_VERSION,
            "window": self.window, "fading": self.fading, "log_every": self.log_every,
            "records": self.records,
            "abs_error_sum": float(s[0]), "sq_error_sum": float(s[1]),
            "true_mean": float(s[2]), "true_m2": float(s[3]),
            "fading_sum": float(s[4]), "fading_count": float(s[5]),
            "ring_true": self._ring_y.copy(), "ring_pred": self._ring_p.copy(),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> "RegressionScore":
        """Rebuild a scorer from :meth:`state_dict` output (also as loaded from .npz)."""
        _check_kind(state, "regression_score")
        score = cls(_scalar(state, "window", int), _scalar(state, "fading", float),
                    _scalar(state, "log_every", int))
        n = _scalar(state, "records", int)
        if n < 0:
            raise ModelFileError(f"metrics state: record count {n} is negative")
        score._ring_y = _array(state, "ring_true", np.float64, (score.window,))
        score._ring_p = _array(state, "ring_pred", np.float64, (score.window,))
        score._counts[:] = (n, n % score.window)
        score._sums[:] = [_scalar(state, name, float) for name in
                          ("abs_error_sum", "sq_error_sum", "true_mean", "true_m2",
                           "fading_sum", "fading_count")]
        return score
