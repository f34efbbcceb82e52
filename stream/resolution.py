"""The resolution of a numeric field: how many decimals its values carry.

A sensor that reports whole minutes, or tenths of a degree, has a resolution; a split
threshold between two such values (13.3636 between 13 and 14) holds no more than the
value below it does: on values with ``d`` decimals, ``x <= t`` and ``x > t`` select the
same records as ``x <= floor_d(t)`` and ``x > floor_d(t)``. The rules' text forms use this
to print thresholds in the units the data have (see :mod:`stream.rules.thresholds`).

decimals_of(values) -> int
    The decimals a sample of values carries: 0..MAX_DECIMALS, or FINE for more.
"""

from __future__ import annotations

import numpy as np

from stream.jit import njit

MAX_DECIMALS = 6
"""Most decimals told apart; values with more count as :data:`FINE`."""

FINE = MAX_DECIMALS + 1
"""A field whose values carry more than :data:`MAX_DECIMALS` decimals (a computed value)."""

SAMPLE = 512
"""Values of a batch's column looked at (spread evenly over the batch)."""

_SCALES = 10.0 ** np.arange(MAX_DECIMALS + 1)


def slack(scaled):
    """How far a value times 10^d may sit from a whole number and still count as one:
    the rounding of the product (0.3 * 10 is 2.9999999999999996), never a real digit."""
    return 1e-6 + 1e-12 * np.abs(scaled)


def decimals_of(values: np.ndarray) -> int:
    """Decimals the finite values among an even sample of ``values`` carry: the least
    ``d <= MAX_DECIMALS`` with every value a whole multiple of 10^-d (within
    :func:`slack`), else :data:`FINE`; 0 when no value is finite."""
    values = np.asarray(values, dtype=np.float64)
    step = values.size // SAMPLE if values.size > SAMPLE else 1
    return int(_least_decimals(values, step, _SCALES))


@njit(borrows=True)
def _least_decimals(values, step, scales):   # pragma: no cover - compiled
    """:func:`decimals_of` over ``values[::step]``, in one pass per candidate ``d`` that
    stops at the first value that does not fit (no temporary arrays)."""
    finite = False
    for i in range(0, values.size, step):
        if np.isfinite(values[i]):
            finite = True
            break
    if not finite:
        return 0
    for d in range(MAX_DECIMALS + 1):
        fits = True
        for i in range(0, values.size, step):
            v = values[i]
            if not np.isfinite(v):
                continue
            scaled = abs(v) * scales[d]
            if abs(scaled - np.rint(scaled)) > 1e-6 + 1e-12 * abs(scaled):
                fits = False
                break
        if fits:
            return d
    return FINE
