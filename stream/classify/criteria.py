"""Split criteria and the Hoeffding bound, as compiled functions over class-weight arrays.

Contents
--------
hoeffding_bound(value_range, delta, n)
    eps = sqrt(R^2 ln(1/delta) / (2 n))  (Hoeffding 1963; Domingos & Hulten, KDD 2000).
criterion_range(criterion, n_classes)
    R for information gain in bits, log2(max(C, 2)), or for Gini, 1.
split_merit(criterion, pre, post, n_branches, min_branch_fraction)
    Merit of a candidate split: information gain or Gini gain; ``-inf`` when fewer than
    two branches hold more than ``min_branch_fraction`` of the weight.

Distributions are float64 arrays of class weights; ``post`` is a 2-D array, one row per
branch. Criterion ids come from :data:`stream.classify.settings.CRITERIA`.
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit

INFO_GAIN = 0
GINI = 1


@njit(cache=True)
def criterion_range(criterion: int, n_classes: int) -> float:
    """Range R of the merit: log2(C) bits for information gain (C >= 2), 1 for Gini."""
    if criterion == GINI:
        return 1.0
    if n_classes < 2:
        n_classes = 2
    return math.log2(n_classes)


@njit(cache=True)
def entropy(dist: np.ndarray) -> float:
    """Shannon entropy in bits of a vector of class weights (0 for an empty vector)."""
    total = 0.0
    acc = 0.0
    for k in range(dist.shape[0]):
        d = dist[k]
        if d > 0.0:
            acc -= d * math.log2(d)
            total += d
    if total > 0.0:
        return (acc + total * math.log2(total)) / total
    return 0.0


@njit(cache=True)
def gini_impurity(dist: np.ndarray, total: float) -> float:
    """1 - sum p_k^2 of a vector of class weights with the given total."""
    g = 1.0
    if total != 0.0:
        for k in range(dist.shape[0]):
            p = dist[k] / total
            g -= p * p
    return g


@njit(cache=True)
def branches_above(post: np.ndarray, n_branches: int, min_fraction: float) -> int:
    """Number of branches holding strictly more than ``min_fraction`` of the weight."""
    total = 0.0
    for b in range(n_branches):
        total += post[b].sum()
    count = 0
    if total > 0.0:
        for b in range(n_branches):
            if post[b].sum() / total > min_fraction:
                count += 1
    return count


@njit(cache=True)
def split_merit(criterion: int, pre: np.ndarray, post: np.ndarray, n_branches: int,
                min_fraction: float) -> float:
    """Merit of splitting ``pre`` into the first ``n_branches`` rows of ``post``."""
    if branches_above(post, n_branches, min_fraction) < 2:
        return -math.inf
    total = 0.0
    for b in range(n_branches):
        total += post[b].sum()
    if criterion == GINI:
        g = 0.0
        for b in range(n_branches):
            w = post[b].sum()
            g += (w / total) * gini_impurity(post[b], w)
        return gini_impurity(pre, pre.sum()) - g
    h = 0.0
    for b in range(n_branches):
        h += post[b].sum() * entropy(post[b])
    return entropy(pre) - h / total
