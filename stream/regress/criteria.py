"""Target statistics and the split merits of the regression tree, as compiled functions.

Contents
--------
stats_add(dest, src) / stats_sub(total, part, out)
    Merge two (count, mean, M2) triples, or take one out of a total (Chan et al.'s
    parallel form of Welford's update, weighted).
variance(st) / deviation(st)
    Sample variance (n - 1 in the denominator, 0 below two records) and its square root.
split_merit(criterion, pre, left, right, min_records)
    Variance reduction var(S) - sum |S_i|/|S| var(S_i), or standard deviation reduction
    sd(S) - sum |S_i|/|S| sd(S_i) (Ikonomovska, Gama & Dzeroski, Data Mining and
    Knowledge Discovery 2011, FIMT-DD); ``-inf`` when a branch has fewer than
    ``min_records`` records.
split_confident(best, second, n, delta, tau)
    FIMT-DD's decision: split when second / best < 1 - eps, with eps the Hoeffding bound
    for a range of 1 (the ratio lies in [0, 1]), or when eps < tau (a tie).

Statistics are float64 arrays whose last axis is (count, mean, M2); indices ST_* of
:mod:`stream.regress.tables`.
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit
from stream.tree.bound import hoeffding_bound

VARIANCE = 0
DEVIATION = 1


@njit(borrows=True)
def stats_add(dest: np.ndarray, src: np.ndarray) -> None:
    """``dest`` <- ``dest`` merged with ``src`` (both (count, mean, M2))."""
    n2 = src[0]
    if n2 <= 0.0:
        return
    n1 = dest[0]
    n = n1 + n2
    d = src[1] - dest[1]
    dest[1] += d * (n2 / n)
    dest[2] += src[2] + d * d * (n1 * n2 / n)
    dest[0] = n


@njit(borrows=True)
def stats_sub(total: np.ndarray, part: np.ndarray, out: np.ndarray) -> None:
    """``out`` <- the records of ``total`` that are not in ``part``."""
    n = total[0]
    n1 = part[0]
    n2 = n - n1
    if n2 <= 1e-9 * max(n, 1.0):
        out[0] = 0.0
        out[1] = 0.0
        out[2] = 0.0
        return
    mean2 = (n * total[1] - n1 * part[1]) / n2
    d = mean2 - part[1]
    m2 = total[2] - part[2] - d * d * (n1 * n2 / n)
    out[0] = n2
    out[1] = mean2
    out[2] = m2 if m2 > 0.0 else 0.0


@njit(borrows=True)
def variance(st: np.ndarray) -> float:
    """Sample variance of (count, mean, M2); 0 below two records."""
    if st[0] > 1.0:
        return st[2] / (st[0] - 1.0)
    return 0.0


@njit(borrows=True)
def deviation(st: np.ndarray) -> float:
    """Sample standard deviation of (count, mean, M2); 0 below two records."""
    return math.sqrt(variance(st))


@njit(borrows=True)
def _spread(criterion: int, st: np.ndarray) -> float:
    if criterion == DEVIATION:
        return deviation(st)
    return variance(st)


@njit(borrows=True)
def split_merit(criterion: int, pre: np.ndarray, left: np.ndarray, right: np.ndarray,
                min_records: float) -> float:
    """Reduction of the target's spread by splitting ``pre`` into ``left`` and ``right``."""
    if left[0] < min_records or right[0] < min_records:
        return -math.inf
    n = pre[0]
    return _spread(criterion, pre) - (left[0] / n) * _spread(criterion, left) \
        - (right[0] / n) * _spread(criterion, right)


@njit(borrows=True)
def multiway_merit(criterion: int, pre: np.ndarray, branches: np.ndarray, rows: int,
                   min_records: float) -> float:
    """Reduction of spread by splitting ``pre`` into the first ``rows`` rows of ``branches``."""
    n = pre[0]
    merit = _spread(criterion, pre)
    for b in range(rows):
        if branches[b, 0] < min_records:
            return -math.inf
        merit -= (branches[b, 0] / n) * _spread(criterion, branches[b])
    return merit


@njit(borrows=True)
def split_confident(best: float, second: float, n: float, delta: float,
                    tau: float) -> bool:
    """Whether the best candidate is reliably better than the second (FIMT-DD's ratio test)."""
    if not best > 0.0:
        return False
    eps = hoeffding_bound(1.0, delta, n)
    return second / best < 1.0 - eps or eps < tau
