"""Drift detectors as compiled functions over detector tables: ADWIN and Page-Hinkley.

ADWIN (Bifet & Gavalda, SDM 2007)
    Keeps a window of recent values compressed into an exponential histogram of buckets
    (``max_buckets`` per size, sizes 1, 2, 4, ...). Every ``clock`` updates, once the
    window is longer than ``grace_period``, each cut of the window into an older and a
    newer part is tested; when the two means differ by more than

        eps = sqrt(2 m v ln(2 ln(W) / delta)) + 2/3 ln(2 ln(W) / delta) m,
        m = 1 / (n0 - min_len + 1) + 1 / (n1 - min_len + 1),  v = window variance,

    the oldest bucket is dropped and the test repeats. An alarm resets the detector at
    the next update. Parameters and this exact schedule are river 0.26.1's
    (``river.drift.ADWIN``), so alarms fall on the same records (tests/tree/test_drift.py).
Page-Hinkley (Page 1954)
    Cumulative deviations from the running mean with a forgetting factor ``alpha``; an
    alarm when the deviation from the running extreme exceeds ``threshold`` (after
    ``min_instances`` values), upwards, downwards or both, as ``river.drift.PageHinkley``.

Tables (one row per detector, so every tree node can own one)
    adwin_buckets  f8[D, L, M + 1, 2]  per level: bucket totals and variances
    adwin_counts   int64[D, L]         buckets in use per level
    adwin_state    f8[D, ADWIN_COLS]   width, total, variance, tick, levels, alarm flag
    ph_state       f8[D, PH_COLS]      n, mean, sum up, sum down, min up, max down, flag
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit

from .settings import DETECTORS

ADWIN_LEVELS = 26          # window up to ~2^26 * max_buckets values before levels run out
A_WIDTH, A_TOTAL, A_VARIANCE, A_TICK, A_LEVELS, A_ALARM = range(6)
ADWIN_COLS = 6
P_N, P_MEAN, P_UP, P_DOWN, P_MIN_UP, P_MAX_DOWN, P_ALARM = range(7)
PH_COLS = 7

ADWIN, PAGE_HINKLEY, NO_DETECTOR = (DETECTORS[name] for name in ("adwin", "page_hinkley", "off"))


def adwin_tables(n: int, max_buckets: int = 5) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Empty ADWIN tables for ``n`` detectors."""
    return (np.zeros((n, ADWIN_LEVELS, max_buckets + 1, 2)),
            np.zeros((n, ADWIN_LEVELS), np.int64),
            np.zeros((n, ADWIN_COLS)))


def page_hinkley_table(n: int) -> np.ndarray:
    """Empty Page-Hinkley table for ``n`` detectors."""
    table = np.zeros((n, PH_COLS))
    table[:, P_MIN_UP] = math.inf
    table[:, P_MAX_DOWN] = -1.0
    return table


@njit(borrows=True)
def adwin_reset(buckets, counts, state, d: int) -> None:
    """Forget everything detector ``d`` has seen."""
    buckets[d] = 0.0
    counts[d] = 0
    state[d] = 0.0
    state[d, A_LEVELS] = 1.0


@njit(inline='always', borrows=True)
def _adwin_delete_oldest(buckets, counts, state, d: int) -> float:
    """Drop the oldest bucket; returns its size."""
    level = int(state[d, A_LEVELS]) - 1
    n = float(1 << level)
    u = buckets[d, level, 0, 0]
    mu = u / n
    v = buckets[d, level, 0, 1]
    state[d, A_WIDTH] -= n
    state[d, A_TOTAL] -= u
    mu_window = state[d, A_TOTAL] / state[d, A_WIDTH]
    state[d, A_VARIANCE] -= v + n * state[d, A_WIDTH] * (mu - mu_window) * (mu - mu_window) \
        / (n + state[d, A_WIDTH])
    c = counts[d, level]
    for i in range(1, c):
        buckets[d, level, i - 1, 0] = buckets[d, level, i, 0]
        buckets[d, level, i - 1, 1] = buckets[d, level, i, 1]
    buckets[d, level, c - 1, 0] = 0.0
    buckets[d, level, c - 1, 1] = 0.0
    counts[d, level] = c - 1
    if c - 1 == 0:
        state[d, A_LEVELS] = level
    return n


@njit(inline='always', borrows=True)
def _adwin_compress(buckets, counts, state, d: int, max_buckets: int) -> None:
    level = 0
    while counts[d, level] == max_buckets + 1:
        if level + 1 >= ADWIN_LEVELS:
            break  # cannot happen before 2^26 * max_buckets values
        if level + 1 >= state[d, A_LEVELS]:
            state[d, A_LEVELS] = level + 2
        n = float(1 << level)
        t0 = buckets[d, level, 0, 0]
        t1 = buckets[d, level, 1, 0]
        mu1 = t0 / n
        mu2 = t1 / n
        v12 = buckets[d, level, 0, 1] + buckets[d, level, 1, 1] + \
            n * n * (mu1 - mu2) * (mu1 - mu2) / (n + n)
        nxt = counts[d, level + 1]
        buckets[d, level + 1, nxt, 0] = t0 + t1
        buckets[d, level + 1, nxt, 1] = v12
        counts[d, level + 1] = nxt + 1
        c = counts[d, level]
        for i in range(2, c):
            buckets[d, level, i - 2, 0] = buckets[d, level, i, 0]
            buckets[d, level, i - 2, 1] = buckets[d, level, i, 1]
        for i in range(c - 2, c):
            buckets[d, level, i, 0] = 0.0
            buckets[d, level, i, 1] = 0.0
        counts[d, level] = c - 2
        if counts[d, level + 1] <= max_buckets:
            break
        level += 1


@njit(inline='always', borrows=True)
def _adwin_cut(n0: float, n1: float, delta_mean: float, min_len: int, variance: float,
               delta_prime: float) -> bool:
    m_recip = 1.0 / (n0 - min_len + 1) + 1.0 / (n1 - min_len + 1)
    epsilon = math.sqrt(2.0 * m_recip * variance * delta_prime) + \
        2.0 / 3.0 * delta_prime * m_recip
    return abs(delta_mean) > epsilon


@njit(inline='always', borrows=True)
def _adwin_detect(buckets, counts, state, d: int, delta: float, clock: int, min_len: int,
                  grace: int) -> bool:
    detected = False
    state[d, A_TICK] += 1.0
    if int(state[d, A_TICK]) % clock != 0 or state[d, A_WIDTH] <= grace:
        return False
    reduce = True
    while reduce:
        reduce = False
        done = False
        n0 = 0.0
        n1 = state[d, A_WIDTH]
        u0 = 0.0
        u1 = state[d, A_TOTAL]
        level = int(state[d, A_LEVELS]) - 1
        # width and variance change only when a bucket is dropped, which ends this pass
        width = state[d, A_WIDTH]
        delta_prime = math.log(2.0 * math.log(width) / delta)
        variance = state[d, A_VARIANCE] / width
        while level >= 0 and not done:
            size = float(1 << level)
            for k in range(counts[d, level]):
                n0 += size
                n1 -= size
                u0 += buckets[d, level, k, 0]
                u1 -= buckets[d, level, k, 0]
                if level == 0 and k == counts[d, level] - 1:
                    done = True
                    break
                if n1 >= min_len and n0 >= min_len and \
                        _adwin_cut(n0, n1, u0 / n0 - u1 / n1, min_len, variance, delta_prime):
                    reduce = True
                    detected = True
                    if state[d, A_WIDTH] > 0:
                        _adwin_delete_oldest(buckets, counts, state, d)
                        done = True
                        break
            level -= 1
    return detected


@njit(borrows=True)
def adwin_update(buckets, counts, state, d: int, value: float, delta: float, clock: int,
                 max_buckets: int, min_len: int, grace: int) -> bool:
    """Add ``value`` to detector ``d``; True when it raises an alarm on this value."""
    if state[d, A_ALARM] != 0.0 or state[d, A_LEVELS] == 0.0:
        adwin_reset(buckets, counts, state, d)
    width = state[d, A_WIDTH] + 1.0
    state[d, A_WIDTH] = width
    c = counts[d, 0]
    buckets[d, 0, c, 0] = value
    buckets[d, 0, c, 1] = 0.0
    counts[d, 0] = c + 1
    if width > 1.0:
        previous = width - 1.0
        mean = state[d, A_TOTAL] / previous
        state[d, A_VARIANCE] += previous * (value - mean) * (value - mean) / width
    state[d, A_TOTAL] += value
    _adwin_compress(buckets, counts, state, d, max_buckets)
    alarm = _adwin_detect(buckets, counts, state, d, delta, clock, min_len, grace)
    state[d, A_ALARM] = 1.0 if alarm else 0.0
    return alarm


@njit(borrows=True)
def adwin_mean(state, d: int) -> float:
    """Mean of the values in detector ``d``'s window (0 when empty)."""
    width = state[d, A_WIDTH]
    return state[d, A_TOTAL] / width if width > 0 else 0.0


@njit(borrows=True)
def page_hinkley_reset(ph, d: int) -> None:
    """Forget everything detector ``d`` has seen."""
    ph[d] = 0.0
    ph[d, P_MIN_UP] = math.inf
    ph[d, P_MAX_DOWN] = -1.0


@njit(borrows=True)
def page_hinkley_update(ph, d: int, value: float, min_instances: int, delta: float,
                        threshold: float, alpha: float, mode: int) -> bool:
    """Add ``value`` to detector ``d``; True on an alarm. ``mode``: 0 both, 1 up, 2 down."""
    if ph[d, P_ALARM] != 0.0:
        page_hinkley_reset(ph, d)
    n = ph[d, P_N] + 1.0
    ph[d, P_N] = n
    ph[d, P_MEAN] += (1.0 / n) * (value - ph[d, P_MEAN])
    dev = value - ph[d, P_MEAN]
    ph[d, P_UP] = alpha * ph[d, P_UP] + dev - delta
    ph[d, P_DOWN] = alpha * ph[d, P_DOWN] + dev + delta
    if ph[d, P_UP] < ph[d, P_MIN_UP]:
        ph[d, P_MIN_UP] = ph[d, P_UP]
    if ph[d, P_DOWN] > ph[d, P_MAX_DOWN]:
        ph[d, P_MAX_DOWN] = ph[d, P_DOWN]
    alarm = False
    if n >= min_instances:
        up = ph[d, P_UP] - ph[d, P_MIN_UP]
        down = ph[d, P_MAX_DOWN] - ph[d, P_DOWN]
        if mode == 0:
            alarm = up > threshold or down > threshold
        elif mode == 1:
            alarm = up > threshold
        else:
            alarm = down > threshold
    ph[d, P_ALARM] = 1.0 if alarm else 0.0
    return alarm


@njit(borrows=True)
def page_hinkley_rose(ph, d: int, threshold: float) -> bool:
    """After an alarm: whether the upward test fired (the mean rose)."""
    return ph[d, P_UP] - ph[d, P_MIN_UP] > threshold


@njit
def adwin_run(values, delta: float, clock: int, max_buckets: int, min_len: int,
              grace: int) -> np.ndarray:
    """Indices at which one ADWIN detector fed ``values`` raises alarms (for tests)."""
    buckets, counts, state = np.zeros((1, ADWIN_LEVELS, max_buckets + 1, 2)), \
        np.zeros((1, ADWIN_LEVELS), np.int64), np.zeros((1, ADWIN_COLS))
    out = np.empty(values.shape[0], np.int64)
    m = 0
    for i in range(values.shape[0]):
        if adwin_update(buckets, counts, state, 0, values[i], delta, clock, max_buckets,
                        min_len, grace):
            out[m] = i
            m += 1
    return out[:m]


@njit
def page_hinkley_run(values, min_instances: int, delta: float, threshold: float,
                     alpha: float, mode: int) -> np.ndarray:
    """Indices at which one Page-Hinkley detector fed ``values`` raises alarms."""
    ph = np.zeros((1, PH_COLS))
    page_hinkley_reset(ph, 0)
    out = np.empty(values.shape[0], np.int64)
    m = 0
    for i in range(values.shape[0]):
        if page_hinkley_update(ph, 0, values[i], min_instances, delta, threshold, alpha, mode):
            out[m] = i
            m += 1
    return out[:m]
