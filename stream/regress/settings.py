"""Settings of the Hoeffding regression tree: one frozen dataclass, validated once.

The regressor shares the Hoeffding bound, grace period, tie threshold and memory budget
with the classifier (published defaults: grace period 200, delta 1e-7, tie threshold
0.05; Domingos & Hulten, KDD 2000), but its split criteria, leaf models and numeric
split statistic differ, so it has its own settings and registries rather than overloading
:class:`stream.classify.settings.TreeSettings`.

Registries map names to kernel ids; the CLI takes its choices from them.
"""

from __future__ import annotations

import dataclasses
import math

from stream.checks import require_choice, require_float, require_int
from stream.tree.settings import SettingsRecord, check_drift_settings

REGRESSION_CRITERIA = {"variance": 0, "deviation": 1}
"""Split merits by name -> kernel id. ``variance``: variance reduction (as river's
regression trees); ``deviation``: standard deviation reduction (Ikonomovska et al., 2011,
FIMT-DD). Both are compared as the ratio second best / best, whose range is 1."""

REGRESSION_LEAF_MODELS = {"mean": 0, "linear": 1, "adaptive": 2}
"""Leaf predictors by name -> kernel id. ``mean``: the leaf's target mean; ``linear``: an
online linear model on standardised inputs (FIMT-DD's perceptron leaves); ``adaptive``:
per leaf, whichever of the two has the lower faded squared error."""

REGRESSION_SPLITS = {"quantile": 0}
"""Numeric split statistics by name -> kernel id. ``quantile``: per leaf and feature,
bins with edges at quantiles of the first values the leaf sees, holding the exact
target count, mean and variance per bin (bounded memory; see
:mod:`stream.regress.splits`)."""


@dataclasses.dataclass(frozen=True)
class RegressionSettings(SettingsRecord):
    """How the regression tree grows and predicts.

    Parameters
    ----------
    criterion
        Split merit: ``variance`` or ``deviation`` reduction.
    grace_period
        Records a leaf sees between split attempts (n_min).
    delta
        One minus the confidence of the Hoeffding bound.
    tie_threshold
        Split anyway when the bound has shrunk below this (tau).
    leaf_model
        ``mean``, ``linear`` or ``adaptive``.
    numeric_splits
        ``quantile`` (the only one so far).
    bins
        Bins per leaf and numeric feature; bins - 1 candidate thresholds.
    min_branch_records
        A candidate split needs at least this many records on each branch.
    binary_categories
        Split categories as ``x == v`` / ``x != v`` only, never one branch per value.
    max_depth
        Depth at which leaves stop growing; ``None`` for no limit.
    memory_mb
        Budget for the split statistics of active leaves; beyond it the leaves with the
        smallest remaining squared error are deactivated (they keep predicting).
    learning_rate
        Step of the linear leaves' normalised least-mean-squares update, in (0, 2).
    selector_decay
        Fading factor of the squared errors the adaptive leaves compare, in (0, 1].
    detector
        Drift detector kept at every node on the normalised absolute error of the
        records' leaf predictions (:mod:`stream.regress.drift`): ``adwin``,
        ``page_hinkley`` or ``off``. On an alarm where the error rose an alternate
        subtree grows beside the node (Bifet & Gavalda, IDA 2009).
    adwin_delta
        ADWIN's confidence parameter (smaller: fewer, later alarms).
    page_hinkley_threshold
        Page-Hinkley's alarm threshold lambda, in units of summed normalised error.
    swap_after
        Records both a node and its alternate must have been scored on before they
        are compared.
    swap_significance
        Significance of the comparison that swaps in (or drops) an alternate.
    """

    criterion: str = "variance"
    grace_period: int = 200
    delta: float = 1e-7
    tie_threshold: float = 0.05
    leaf_model: str = "adaptive"
    numeric_splits: str = "quantile"
    bins: int = 32
    min_branch_records: int = 5
    binary_categories: bool = False
    max_depth: int | None = None
    memory_mb: float = 256.0
    learning_rate: float = 0.05
    selector_decay: float = 0.95
    detector: str = "adwin"
    adwin_delta: float = 0.002
    page_hinkley_threshold: float = 50.0
    swap_after: int = 300
    swap_significance: float = 0.05

    def __post_init__(self) -> None:
        require_choice("criterion", self.criterion, REGRESSION_CRITERIA)
        require_int("grace period", self.grace_period, 1)
        require_float("delta", self.delta, 0.0, 1.0)
        require_float("tie threshold", self.tie_threshold, 0.0, math.inf, low_open=False)
        require_choice("leaf model", self.leaf_model, REGRESSION_LEAF_MODELS)
        require_choice("numeric splits", self.numeric_splits, REGRESSION_SPLITS)
        require_int("bins", self.bins, 2)
        require_int("min branch records", self.min_branch_records, 1)
        if self.max_depth is not None:
            require_int("max depth", self.max_depth, 1)
        require_float("memory budget (MB)", self.memory_mb, 0.0, math.inf)
        require_float("learning rate", self.learning_rate, 0.0, 2.0)
        require_float("selector decay", self.selector_decay, 0.0, 1.0, high_open=False)
        check_drift_settings(self)
