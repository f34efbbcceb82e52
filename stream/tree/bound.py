"""The Hoeffding bound (Hoeffding 1963), as Domingos & Hulten (KDD 2000) use it to decide a
split: with probability 1 - delta, the true mean of a variable of range R lies within eps
of the mean of n observations, eps = sqrt(R^2 ln(1/delta) / (2 n))."""

from __future__ import annotations

import math

from stream.jit import njit


@njit(cache=True)
def hoeffding_bound(value_range: float, delta: float, n: float) -> float:
    """Return eps such that the true mean is within eps of the observed one w.p. 1 - delta."""
    return math.sqrt((value_range * value_range * math.log(1.0 / delta)) / (2.0 * n))
