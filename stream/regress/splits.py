"""What an active regression leaf keeps per feature, and the split candidates it offers.

Quantile split statistic (numeric features)
    Per leaf and feature, the first W values (W = 4 x bins) are buffered with their
    targets; then bin edges are placed at quantiles of those values (midway between
    neighbouring values, every distinct value when there are few), the buffer is replayed
    into the bins, and every later record updates the exact target count, mean and M2 of
    its bin. Candidate thresholds are the edges (``x <= edge`` goes left); the target
    statistics on either side are exact merges of whole bins.

    Why this statistic: FIMT-DD's extended binary search tree (E-BST) keeps one node per
    distinct value, so its memory and evaluation cost grow with the stream at a leaf that
    does not split, and it needs a pointer tree that compiled table code cannot hold in
    fixed arrays. Rounding values first (river's truncated E-BST) or hashing them into
    bins of a fixed radius (river's QO split statistic; Mastelini & de Leon Ferreira, Pattern
    Recognition Letters 2021) bounds the memory but ties the bin width to the feature's
    units: one digit of rounding is too coarse for a feature in [0, 0.01] and too fine for
    one in the thousands, and a deep leaf that covers a narrow slice of a feature falls
    into one or two fixed bins and can no longer split on it. Quantile edges taken from
    the leaf's own first values have neither problem: memory is fixed (bins - 1 edges,
    3 x bins sums, the buffer), the edges follow the leaf's own slice of each feature
    whatever its units, and the statistics inside the bins are exact. The price: a
    threshold can only fall on an edge (the resolution is about 1/bins of the leaf's
    distribution), and edges do not move if a feature's distribution shifts within a
    leaf's life. The classifier's histogram split statistic places its edges the same way.
    Memory per active leaf and numeric feature: (bins - 1) + 3 bins + 8 bins + 3 floats,
    about 3 KB at 32 bins, two thirds of it the buffer.
Category statistics
    Target count, mean and M2 per category code: one multiway candidate (a branch per
    code seen) and one ``x == code`` candidate per code.

Functions take the table they work on (layouts in :mod:`stream.regress.tables`), the
slot ``s`` and the feature's index ``j`` among features of its kind.
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit

from .criteria import multiway_merit, split_merit, stats_add
from .tables import FM_KIND, FM_LOCAL, Q_NBUF, Q_NEDGES, Q_READY, ST_M2, ST_MEAN, ST_N


@njit(borrows=True)
def welford(stats: np.ndarray, s: int, j: int, b: int, y: float, w: float) -> None:
    """Add target ``y`` with weight ``w`` to the (count, mean, M2) of ``stats[s, j, b]``."""
    # indexed element by element: views would cost reference counting
    n = stats[s, j, b, ST_N] + w
    mean_old = stats[s, j, b, ST_MEAN]
    mean = mean_old + (w / n) * (y - mean_old)
    stats[s, j, b, ST_M2] += w * (y - mean_old) * (y - mean)
    stats[s, j, b, ST_MEAN] = mean
    stats[s, j, b, ST_N] = n


@njit(borrows=True)
def observe(edges: np.ndarray, stats: np.ndarray, buf: np.ndarray, meta: np.ndarray,
            cstats: np.ndarray, fmap: np.ndarray, s: int, X: np.ndarray, i: int,
            y: float) -> bool:
    """Add record ``X[i]`` with target ``y`` to every split statistic of slot ``s``.

    Numeric values are buffered until the edges are set, then counted in their bin;
    category codes update their own statistics; missing values are skipped. Returns
    True when a buffer has just filled: the caller then sets its edges
    (:func:`set_filled_edges`, which sorts, so it cannot be called from here).
    """
    filled = False
    # One call per record, written out in full (and compiled without reference
    # counting): per-feature calls that pass arrays cost more than the work itself.
    for f in range(fmap.shape[0]):
        v = X[i, f]
        if math.isnan(v):
            continue
        j = fmap[f, FM_LOCAL]
        if fmap[f, FM_KIND] == 1:
            b = int(v)
            cnt = cstats[s, j, b, ST_N] + 1.0
            mean_old = cstats[s, j, b, ST_MEAN]
            mean = mean_old + (y - mean_old) / cnt
            cstats[s, j, b, ST_M2] += (y - mean_old) * (y - mean)
            cstats[s, j, b, ST_MEAN] = mean
            cstats[s, j, b, ST_N] = cnt
            continue
        if meta[s, j, Q_READY] == 0:
            k = meta[s, j, Q_NBUF]
            buf[s, j, k, 0] = v
            buf[s, j, k, 1] = y
            meta[s, j, Q_NBUF] = k + 1
            if k + 1 == buf.shape[2]:
                filled = True
            continue
        # lower bound search over the edges, in steps that compile to conditional moves:
        # the comparisons are unpredictable and mispredictions cost more than the search
        b = 0
        n = meta[s, j, Q_NEDGES]
        if n > 0:
            while n > 1:
                half = n >> 1
                b = b + half if edges[s, j, b + half - 1] < v else b
                n -= half
            if edges[s, j, b] < v:
                b += 1
        cnt = stats[s, j, b, ST_N] + 1.0
        mean_old = stats[s, j, b, ST_MEAN]
        mean = mean_old + (y - mean_old) / cnt
        stats[s, j, b, ST_M2] += (y - mean_old) * (y - mean)
        stats[s, j, b, ST_MEAN] = mean
        stats[s, j, b, ST_N] = cnt
    return filled


@njit
def set_filled_edges(edges: np.ndarray, stats: np.ndarray, buf: np.ndarray, meta: np.ndarray,
                     fmap: np.ndarray, s: int) -> None:
    """Set the edges of every numeric feature of slot ``s`` whose buffer is full."""
    for f in range(fmap.shape[0]):
        j = fmap[f, FM_LOCAL]
        if fmap[f, FM_KIND] == 0 and meta[s, j, Q_READY] == 0 \
                and meta[s, j, Q_NBUF] == buf.shape[2]:
            quantile_set_edges(edges, stats, buf, meta, s, j)


@njit(borrows=True)
def bin_of(edges: np.ndarray, s: int, j: int, n_edges: int, v: float) -> int:
    """Number of edges below ``v``: the bin holding ``v`` (``v`` == edge goes left)."""
    b = 0
    n = n_edges
    if n > 0:
        while n > 1:
            half = n >> 1
            b = b + half if edges[s, j, b + half - 1] < v else b
            n -= half
        if edges[s, j, b] < v:
            b += 1
    return b


@njit
def quantile_set_edges(edges: np.ndarray, stats: np.ndarray, buf: np.ndarray,
                       meta: np.ndarray, s: int, j: int) -> None:
    """Place the edges from the buffered values, then replay the buffer into the bins.

    With at most ``bins`` distinct values every gap between neighbours gets an edge
    (exact for discrete features); otherwise the edges sit at the ``q / bins`` quantiles,
    each moved up past runs of equal values so that ties never straddle an edge.
    """
    nb = meta[s, j, Q_NBUF]
    values = np.sort(buf[s, j, :nb, 0])
    max_edges = edges.shape[2]
    distinct = 0
    for i in range(1, nb):
        if values[i] > values[i - 1]:
            distinct += 1
    ne = 0
    if distinct <= max_edges:
        for i in range(1, nb):
            if values[i] > values[i - 1]:
                edges[s, j, ne] = 0.5 * (values[i - 1] + values[i])
                ne += 1
    else:
        bins = max_edges + 1
        for q in range(1, bins):
            i = (q * nb) // bins
            if i < 1:
                i = 1
            while i < nb and values[i] == values[i - 1]:
                i += 1
            if i >= nb:
                break
            e = 0.5 * (values[i - 1] + values[i])
            if ne == 0 or e > edges[s, j, ne - 1]:
                edges[s, j, ne] = e
                ne += 1
    meta[s, j, Q_NEDGES] = ne
    meta[s, j, Q_READY] = 1
    for i in range(nb):
        # the records arrived one at a time, so they are replayed with weight 1 each
        welford(stats, s, j, bin_of(edges, s, j, ne, buf[s, j, i, 0]), buf[s, j, i, 1], 1.0)
    meta[s, j, Q_NBUF] = 0


@njit
def quantile_best(edges: np.ndarray, stats: np.ndarray, buf: np.ndarray, meta: np.ndarray,
                  s: int, j: int, criterion: int, min_records: float, suffix: np.ndarray,
                  left: np.ndarray, right: np.ndarray):
    """Best (merit, threshold) over the edges; the statistics of its two sides into
    ``left`` and ``right``. (-inf, nan) when no edge qualifies. Sets the edges first if
    the statistic is still buffering. ``suffix`` is scratch space, at least bins x 3."""
    if meta[s, j, Q_READY] == 0:
        if meta[s, j, Q_NBUF] == 0:
            return -math.inf, math.nan
        quantile_set_edges(edges, stats, buf, meta, s, j)
    ne = meta[s, j, Q_NEDGES]
    # suffix[b] = bins b..ne merged, built from the right so neither side is a difference
    suffix[ne, :] = stats[s, j, ne, :]
    for b in range(ne - 1, -1, -1):
        suffix[b, :] = suffix[b + 1, :]
        stats_add(suffix[b], stats[s, j, b])
    cum = np.zeros(3)
    best = -math.inf
    threshold = math.nan
    for e in range(ne):
        stats_add(cum, stats[s, j, e])
        merit = split_merit(criterion, suffix[0], cum, suffix[e + 1], min_records)
        if merit > best:
            best = merit
            threshold = edges[s, j, e]
            left[:] = cum
            right[:] = suffix[e + 1]
    return best, threshold


# ---------------------------------------------------------------- category statistics

@njit
def category_best(cstats: np.ndarray, s: int, j: int, n_codes: int, criterion: int,
                  min_records: float, binary_only: bool, rows: np.ndarray,
                  left: np.ndarray, right: np.ndarray):
    """Best (merit, is_multiway, code) among the multiway split (two or more codes seen)
    and each ``x == code`` split; for the latter the two sides go to ``left`` / ``right``.
    ``rows`` is scratch space, at least codes x 3."""
    n_codes = min(n_codes, cstats.shape[2])
    pre = np.zeros(3)
    used = 0
    for code in range(n_codes):
        if cstats[s, j, code, ST_N] > 0.0:
            stats_add(pre, cstats[s, j, code])
            rows[used, :] = cstats[s, j, code, :]
            used += 1
    best = -math.inf
    multiway = False
    best_code = -1
    if not binary_only and used >= 2:
        best = multiway_merit(criterion, pre, rows, used, min_records)
        multiway = True
    rest = np.zeros(3)
    for code in range(n_codes):
        if cstats[s, j, code, ST_N] == 0.0:
            continue
        # the other codes, merged (not pre minus this code, which would lose precision)
        rest[:] = 0.0
        for other in range(n_codes):
            if other != code:
                stats_add(rest, cstats[s, j, other])
        merit = split_merit(criterion, pre, cstats[s, j, code], rest, min_records)
        if merit > best:
            best = merit
            multiway = False
            best_code = code
            left[:] = cstats[s, j, code, :]
            right[:] = rest
    return best, multiway, best_code
