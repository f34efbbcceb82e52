"""Learner settings: one frozen dataclass, validated once, with one message template.

Defaults are the published ones of the Hoeffding tree (Domingos & Hulten, KDD 2000):
grace period 200, delta 1e-7, tie threshold 0.05. The remaining defaults follow the
common practice of streaming tree libraries (10 Gaussian candidate thresholds, a 1 %
minimum branch fraction, no split attempt when one class holds more than 99 %).
"""

from __future__ import annotations

import dataclasses
import math

from stream.checks import require_choice, require_float, require_int
from stream.tree.settings import SettingsRecord, check_drift_settings

CRITERIA = {"info_gain": 0, "gini": 1}
"""Split criteria by name -> kernel id. Information gain in bits (range log2 C) or Gini (range 1)."""

LEAF_MODELS = {"majority": 0, "naive_bayes": 1, "adaptive": 2}
"""Leaf predictors by name -> kernel id. ``adaptive`` uses, per leaf, whichever of the
other two has been right more often on the records that leaf has seen."""


NUMERIC_SPLITS = {"gaussian": 0, "histogram": 1}
"""Numeric split statistics by name -> kernel id. ``gaussian``: per-class normal estimators
with evenly spaced candidate thresholds; ``histogram``: per-leaf quantile bins with exact
class counts, for skewed sensors."""


@dataclasses.dataclass(frozen=True)
class TreeSettings(SettingsRecord):
    """How the tree grows and predicts.

    Parameters
    ----------
    criterion
        Split merit: ``info_gain`` or ``gini``.
    grace_period
        Records a leaf sees between split attempts (n_min).
    delta
        One minus the confidence of the Hoeffding bound.
    tie_threshold
        Split anyway when the bound has shrunk below this (tau).
    leaf_model
        ``majority``, ``naive_bayes`` or ``adaptive``.
    numeric_splits
        ``gaussian`` or ``histogram``.
    candidate_thresholds
        Evenly spaced thresholds the Gaussian split statistic tries between min and max.
    histogram_bins
        Bins per leaf and feature of the histogram split statistic.
    min_branch_fraction
        A split needs two branches each holding more than this share of the weight.
    max_share_to_split
        No split is attempted while one class holds more than this share of a leaf.
    prepruning
        Count "no split" as a candidate (the null attribute of the original paper).
    binary_categories
        Split categories as ``x == v`` / ``x != v`` only, never one branch per value.
    max_depth
        Depth at which leaves stop growing; ``None`` for no limit.
    memory_mb
        Budget for the statistics of active leaves; beyond it the least promising leaves
        (records seen x error rate) are deactivated.
    naive_bayes_after
        Records a leaf must have seen before naive Bayes may predict there.
    detector
        Drift detector kept at every node on its error stream: ``adwin``,
        ``page_hinkley`` or ``off``. On an alarm at a branch an alternate subtree grows
        beside it (Bifet & Gavalda, IDA 2009).
    adwin_delta
        ADWIN's confidence parameter (smaller: fewer, later alarms).
    page_hinkley_threshold
        Page-Hinkley's alarm threshold lambda, in units of summed error.
    swap_after
        Records both the branch and its alternate must have been scored on before they
        are compared.
    swap_significance
        Significance of the comparison that swaps in (or drops) an alternate.
    """

    criterion: str = "info_gain"
    grace_period: int = 200
    delta: float = 1e-7
    tie_threshold: float = 0.05
    leaf_model: str = "adaptive"
    numeric_splits: str = "gaussian"
    candidate_thresholds: int = 10
    histogram_bins: int = 32
    min_branch_fraction: float = 0.01
    max_share_to_split: float = 0.99
    prepruning: bool = True
    binary_categories: bool = False
    max_depth: int | None = None
    memory_mb: float = 256.0
    naive_bayes_after: int = 0
    detector: str = "adwin"
    adwin_delta: float = 0.002
    page_hinkley_threshold: float = 50.0
    swap_after: int = 300
    swap_significance: float = 0.05

    def __post_init__(self) -> None:
        require_choice("criterion", self.criterion, CRITERIA)
        require_int("grace period", self.grace_period, 1)
        require_float("delta", self.delta, 0.0, 1.0)
        require_float("tie threshold", self.tie_threshold, 0.0, math.inf, low_open=False)
        require_choice("leaf model", self.leaf_model, LEAF_MODELS)
        require_choice("numeric splits", self.numeric_splits, NUMERIC_SPLITS)
        require_int("candidate thresholds", self.candidate_thresholds, 1)
        require_int("histogram bins", self.histogram_bins, 2)
        require_float("min branch fraction", self.min_branch_fraction, 0.0, 0.5,
                      low_open=False)
        require_float("max share to split", self.max_share_to_split, 0.0, 1.0,
                      high_open=False)
        if self.max_depth is not None:
            require_int("max depth", self.max_depth, 1)
        require_float("memory budget (MB)", self.memory_mb, 0.0, math.inf)
        require_int("naive Bayes threshold", self.naive_bayes_after, 0)
        check_drift_settings(self)
