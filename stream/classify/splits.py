"""Sufficient statistics an active leaf keeps per feature, and the split candidates they offer.

Gaussian split statistic (numeric features)
    Per class a weighted Welford mean/variance plus min and max. Candidate thresholds are
    evenly spaced between the overall min and max; the class weights on each side are
    estimated from each class's normal CDF. These are the estimators of the Hoeffding tree
    literature (Domingos & Hulten 2000; Kirkby 2007; river does the same); the same statistics feed naive Bayes.
Histogram split statistic (numeric features, optional)
    Per leaf, bin edges are set at quantiles of the first values it sees (so skewed sensors
    get fine bins where the data are), then exact class counts per bin. Candidate thresholds
    are the edges; the class weights on each side are exact.
Category statistics
    Class weights per category code: one multiway candidate (a branch per code) and one
    ``x == code`` candidate per code.

Functions take the statistics table they work on (layouts in :mod:`stream.classify.tables`), the
slot ``s`` and the feature's index ``j`` among features of its kind.
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit

from .criteria import split_merit
from .tables import G_LLA, G_LLB, G_M2, G_MAX, G_MEAN, G_MIN, G_N, H_NBUF, H_NEDGES, H_READY

_HALF_LOG_TAU = 0.5 * math.log(2.0 * math.pi)
_SQRT2 = math.sqrt(2.0)


# ---------------------------------------------------------------- Gaussian split statistic

@njit(borrows=True)
def gaussian_update(gauss: np.ndarray, s: int, j: int, k: int, v: float, w: float,
                    density: bool) -> None:
    """Add value ``v`` of class ``k`` with weight ``w`` to numeric feature ``j``; with
    ``density``, also refresh the cached log-density terms naive Bayes reads."""
    # indexed element by element: views would cost reference counting on the hot path
    n_old = gauss[s, j, k, G_N]
    if n_old == 0.0:
        gauss[s, j, k, G_MIN] = v
        gauss[s, j, k, G_MAX] = v
    else:
        if v < gauss[s, j, k, G_MIN]:
            gauss[s, j, k, G_MIN] = v
        if v > gauss[s, j, k, G_MAX]:
            gauss[s, j, k, G_MAX] = v
    mean_old = gauss[s, j, k, G_MEAN]
    n = n_old + w
    mean = mean_old + (w / n) * (v - mean_old)
    m2 = gauss[s, j, k, G_M2] + w * (v - mean_old) * (v - mean)
    gauss[s, j, k, G_N] = n
    gauss[s, j, k, G_MEAN] = mean
    gauss[s, j, k, G_M2] = m2
    if not density:
        return
    if n > 1.0 and m2 > 0.0:
        var = m2 / (n - 1.0)
        gauss[s, j, k, G_LLA] = -0.5 / var
        gauss[s, j, k, G_LLB] = -_HALF_LOG_TAU - 0.5 * math.log(var)
    else:  # density undefined: contributes nothing (log 1)
        gauss[s, j, k, G_LLA] = 0.0
        gauss[s, j, k, G_LLB] = 0.0


@njit(borrows=True)
def gaussian_log_density(gauss: np.ndarray, s: int, j: int, k: int, v: float) -> float:
    """log N(v; mean, var) of class ``k``; 0 while the variance is undefined."""
    d = v - gauss[s, j, k, G_MEAN]
    return d * d * gauss[s, j, k, G_LLA] + gauss[s, j, k, G_LLB]


@njit(borrows=True)
def gaussian_pooled(gauss: np.ndarray, s: int, j: int, n_classes: int):
    """(mean, variance) of feature ``j`` over every class at slot ``s``; variance 0 when
    fewer than two values or no spread."""
    total = 0.0
    weighted = 0.0
    for c in range(n_classes):
        total += gauss[s, j, c, G_N]
        weighted += gauss[s, j, c, G_N] * gauss[s, j, c, G_MEAN]
    if total < 2.0:
        return 0.0, 0.0
    mean = weighted / total
    m2 = 0.0
    for c in range(n_classes):
        d = gauss[s, j, c, G_MEAN] - mean
        m2 += gauss[s, j, c, G_M2] + gauss[s, j, c, G_N] * d * d
    return mean, max(m2 / (total - 1.0), 0.0)


@njit(borrows=True)
def gaussian_fallback_density(gauss: np.ndarray, s: int, j: int, k: int, v: float,
                              pooled_mean: float, pooled_var: float) -> float:
    """log density of ``v`` for a class without spread on feature ``j``: its own mean
    (the leaf's when it has no value) with its squared deviations shrunk towards the
    leaf's pooled variance (:func:`gaussian_pooled`) by one pseudo-observation; 0 (no
    evidence) when the leaf has no spread either."""
    if pooled_var <= 0.0:
        return 0.0
    n = gauss[s, j, k, G_N]
    mean = gauss[s, j, k, G_MEAN] if n > 0.0 else pooled_mean
    var = (gauss[s, j, k, G_M2] + pooled_var) / max(n, 1.0)
    d = v - mean
    return -d * d / (2.0 * var) - _HALF_LOG_TAU - 0.5 * math.log(var)


@njit
def gaussian_post(gauss: np.ndarray, s: int, j: int, threshold: float,
                  post: np.ndarray) -> None:
    """Estimated class weights left (``x <= threshold``) and right, into post[0], post[1]."""
    for k in range(gauss.shape[2]):
        g = gauss[s, j, k]
        n = g[G_N]
        post[0, k] = 0.0
        post[1, k] = 0.0
        if n == 0.0:
            continue
        if threshold < g[G_MIN]:
            post[1, k] = n
        elif threshold >= g[G_MAX]:
            post[0, k] = n
        else:
            sigma = (g[G_M2] / (n - 1.0)) ** 0.5 if n > 1.0 else 0.0
            cdf = 0.0
            if sigma > 0.0:
                cdf = 0.5 * (1.0 + math.erf(((threshold - g[G_MEAN]) / sigma) / _SQRT2))
            post[0, k] = cdf * n
            post[1, k] = n - post[0, k]


@njit
def gaussian_best(gauss: np.ndarray, s: int, j: int, pre: np.ndarray, criterion: int,
                  min_fraction: float, n_candidates: int, post: np.ndarray):
    """Best (merit, threshold) over evenly spaced thresholds; (-inf, nan) when none."""
    lo = math.inf
    hi = -math.inf
    for k in range(gauss.shape[2]):
        g = gauss[s, j, k]
        if g[G_N] > 0.0:
            if g[G_MIN] < lo:
                lo = g[G_MIN]
            if g[G_MAX] > hi:
                hi = g[G_MAX]
    best = -math.inf
    best_threshold = math.nan
    if lo < math.inf:
        width = (hi - lo) / (n_candidates + 1.0)
        for i in range(n_candidates):
            threshold = lo + width * (i + 1)
            if lo < threshold < hi:
                gaussian_post(gauss, s, j, threshold, post)
                merit = split_merit(criterion, pre, post, 2, min_fraction)
                if merit > best:
                    best = merit
                    best_threshold = threshold
    return best, best_threshold


# ---------------------------------------------------------------- histogram split statistic

@njit
def histogram_update(edges: np.ndarray, counts: np.ndarray, buf: np.ndarray,
                     meta: np.ndarray, s: int, j: int, k: int, v: float, w: float) -> None:
    """Buffer ``v`` until the edges are set, then count it in its bin."""
    m = meta[s, j]
    if m[H_READY] == 0:
        b = m[H_NBUF]
        buf[s, j, b, 0] = v
        buf[s, j, b, 1] = k
        m[H_NBUF] = b + 1
        if b + 1 == buf.shape[2]:
            histogram_set_edges(edges, counts, buf, meta, s, j)
        return
    b = np.searchsorted(edges[s, j, :m[H_NEDGES]], v)
    counts[s, j, b, k] += w


@njit
def histogram_set_edges(edges: np.ndarray, counts: np.ndarray, buf: np.ndarray,
                        meta: np.ndarray, s: int, j: int) -> None:
    """Place bin edges at quantiles of the buffered values, then count the buffer."""
    m = meta[s, j]
    nb = m[H_NBUF]
    values = np.sort(buf[s, j, :nb, 0])
    bins = counts.shape[2]
    ne = 0
    for q in range(1, bins):
        if nb == 0:
            break
        e = values[(q * (nb - 1)) // bins]
        if (ne == 0 or e > edges[s, j, ne - 1]) and e < values[nb - 1]:
            edges[s, j, ne] = e
            ne += 1
    m[H_NEDGES] = ne
    m[H_READY] = 1
    for i in range(nb):
        b = np.searchsorted(edges[s, j, :ne], buf[s, j, i, 0])
        counts[s, j, b, int(buf[s, j, i, 1])] += 1.0
    m[H_NBUF] = 0


@njit
def histogram_post(counts: np.ndarray, s: int, j: int, edge: int, post: np.ndarray) -> None:
    """Exact class weights left (bins 0..edge) and right of edge number ``edge``."""
    for k in range(counts.shape[3]):
        left = 0.0
        right = 0.0
        for b in range(counts.shape[2]):
            if b <= edge:
                left += counts[s, j, b, k]
            else:
                right += counts[s, j, b, k]
        post[0, k] = left
        post[1, k] = right


@njit
def histogram_best(edges: np.ndarray, counts: np.ndarray, buf: np.ndarray, meta: np.ndarray,
                   s: int, j: int, pre: np.ndarray, criterion: int, min_fraction: float,
                   post: np.ndarray):
    """Best (merit, threshold) over the bin edges; sets the edges first if still buffering."""
    if meta[s, j, H_READY] == 0:
        histogram_set_edges(edges, counts, buf, meta, s, j)
    best = -math.inf
    best_threshold = math.nan
    for e in range(meta[s, j, H_NEDGES]):
        histogram_post(counts, s, j, e, post)
        merit = split_merit(criterion, pre, post, 2, min_fraction)
        if merit > best:
            best = merit
            best_threshold = edges[s, j, e]
    return best, best_threshold


@njit
def histogram_post_at(edges: np.ndarray, counts: np.ndarray, meta: np.ndarray, s: int,
                      j: int, threshold: float, post: np.ndarray) -> None:
    """Class weights either side of the edge with value ``threshold``."""
    edge = np.searchsorted(edges[s, j, :meta[s, j, H_NEDGES]], threshold)
    histogram_post(counts, s, j, edge, post)


# ---------------------------------------------------------------- category statistics

@njit(borrows=True)
def category_update(cats: np.ndarray, s: int, j: int, k: int, code: int, w: float) -> None:
    """Add category ``code`` of class ``k`` to categorical feature ``j``."""
    cats[s, j, k, 0] += w
    cats[s, j, k, 1 + code] += w


@njit(borrows=True)
def category_log_likelihood(cats: np.ndarray, s: int, j: int, k: int, code: int,
                            n_codes: int) -> float:
    """log P(code | class k), Laplace-smoothed over the ``n_codes`` codes seen so far."""
    count = cats[s, j, k, 1 + code] if code + 1 < cats.shape[3] else 0.0
    # the code being scored counts among the possible codes even before it was learned
    return math.log((count + 1.0) / (cats[s, j, k, 0] + max(n_codes, code + 1)))


@njit
def category_code_weight(cats: np.ndarray, s: int, j: int, code: int) -> float:
    """Weight of all classes with category ``code``."""
    total = 0.0
    for k in range(cats.shape[2]):
        total += cats[s, j, k, 1 + code]
    return total


@njit
def category_multiway_post(cats: np.ndarray, s: int, j: int, n_codes: int,
                           post: np.ndarray) -> int:
    """One row per observed code (in code order) into ``post``; returns the row count."""
    rows = 0
    for code in range(n_codes):
        if category_code_weight(cats, s, j, code) > 0.0:
            for k in range(cats.shape[2]):
                post[rows, k] = cats[s, j, k, 1 + code]
            rows += 1
    return rows


@njit
def category_equals_post(cats: np.ndarray, s: int, j: int, code: int,
                         post: np.ndarray) -> None:
    """Class weights with ``x == code`` (post[0]) and with another observed code (post[1])."""
    for k in range(cats.shape[2]):
        post[0, k] = cats[s, j, k, 1 + code]
        post[1, k] = cats[s, j, k, 0] - post[0, k]


@njit
def category_best(cats: np.ndarray, s: int, j: int, n_codes: int, pre: np.ndarray,
                  criterion: int, min_fraction: float, binary_only: bool, post: np.ndarray):
    """Best (merit, is_multiway, code) among the multiway split and each ``x == code`` split."""
    best = -math.inf
    multiway = False
    best_code = -1
    if not binary_only:
        rows = category_multiway_post(cats, s, j, n_codes, post)
        if rows > 0:
            best = split_merit(criterion, pre, post, rows, min_fraction)
            multiway = True
    for code in range(n_codes):
        if category_code_weight(cats, s, j, code) == 0.0:
            continue
        category_equals_post(cats, s, j, code, post)
        merit = split_merit(criterion, pre, post, 2, min_fraction)
        if merit > best:
            best = merit
            multiway = False
            best_code = code
    return best, multiway, best_code
