"""TreeRegressor: the Python face of the compiled Hoeffding regression tree.

>>> import numpy as np
>>> from stream.regress.model import RegressionSettings, TreeRegressor
>>> X = np.array([[0.1], [0.9], [0.2], [0.8]])
>>> y = np.array([1.0, 3.0, 1.0, 3.0])
>>> model = TreeRegressor(["pressure"], ["numeric"], RegressionSettings(leaf_model="mean"))
>>> scored = model.learn(X, y)
>>> scored.pred.tolist()          # each record is scored before it is learned
[0.0, 1.0, 2.0, 1.6666666666666667]
"""

from __future__ import annotations

import dataclasses

import numpy as np

from stream.checks import VALUE_LIMIT
from stream.errors import ConfigError, ModelFileError
from stream.tree.upkeep import DriftEvent, TableOps, TableUpkeep
from stream.tree.inputs import check_features, check_rows

from .kernel import has_room, learn_batch, predict_batch, slots_needed, worst_case
from .settings import RegressionSettings
from .tables import RegressorTables, allocate, capacities, check_tables, grow


@dataclasses.dataclass
class ScoredValues:
    """Per-record output of scoring: the predicted value and the node id of the leaf
    that predicted it."""

    pred: np.ndarray
    leaf: np.ndarray


class TreeRegressor(TableUpkeep):
    """An incremental Hoeffding regression tree over numeric and categorical features.

    Parameters
    ----------
    feature_names
        Names of the columns of ``X``.
    feature_kinds
        ``"numeric"`` or ``"category"`` per column; category values arrive as integer
        codes (0, 1, 2, ...) stored as floats. NaN is a missing value everywhere.
    settings
        How the tree grows; :class:`stream.regress.settings.RegressionSettings`
        defaults if omitted.
    """

    _ops = TableOps(capacities, grow, has_room, worst_case, slots_needed)

    def __init__(self, feature_names: list[str], feature_kinds: list[str],
                 settings: RegressionSettings | None = None) -> None:
        check_features(feature_names, feature_kinds)
        self.settings = settings or RegressionSettings()
        self.feature_names = list(feature_names)
        self.feature_kinds = list(feature_kinds)
        self.events_: list[DriftEvent] = []
        self._categories: dict[str, list[str]] = {}
        self.tables_: RegressorTables = allocate(self.settings, self.feature_kinds)
        self._category_columns = np.array(
            [j for j, k in enumerate(self.feature_kinds) if k == "category"], np.int64)

    # ------------------------------------------------------------------ learning
    def learn(self, X: np.ndarray, y: np.ndarray,
              categories: dict[str, list[str]] | None = None, *,
              plain: bool = False) -> ScoredValues:
        """Score each row of ``X`` with the current tree, then learn it with target ``y``
        (finite floats). ``categories`` (labels per categorical feature) only names
        category values in the paths of drift events. ``plain`` runs the general (slower)
        form of the record loop, for tests that hold it to the written-out one."""
        self._categories = categories or {}
        X = self._check_X(X)
        y = np.ascontiguousarray(y, dtype=np.float64)
        if y.ndim != 1 or y.shape[0] != X.shape[0]:
            raise ConfigError(f"y must have {X.shape[0]} values, got shape {y.shape}")
        bad = np.flatnonzero(~(np.abs(y) <= VALUE_LIMIT))
        if bad.size:
            raise ConfigError(f"target values must be finite numbers of magnitude at most "
                              f"{VALUE_LIMIT:g}, got {float(y[bad[0]])!r} at row {int(bad[0])}")
        self._fit_categories(X)
        n = X.shape[0]
        scored = ScoredValues(np.empty(n), np.empty(n, np.int32))
        self._learn_all(n, lambda start: learn_batch(self.tables_, X, y, start, scored.pred,
                                                     scored.leaf, plain))
        return scored

    def predict(self, X: np.ndarray) -> ScoredValues:
        """Score rows of ``X`` without learning."""
        X = self._check_X(X)
        n = X.shape[0]
        scored = ScoredValues(np.empty(n), np.empty(n, np.int32))
        predict_batch(self.tables_, X, scored.pred, scored.leaf)
        return scored

    def _check_X(self, X: np.ndarray) -> np.ndarray:
        return check_rows(X, self.feature_names, self._category_columns)

    # ------------------------------------------------------------------ state
    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        """Everything needed to resume: JSON-able meta and copies of the tables (no
        pickle)."""
        meta = {"kind": "regressor", "settings": self.settings.to_dict(),
                "feature_names": self.feature_names, "feature_kinds": self.feature_kinds}
        return meta, {name: np.array(a) for name, a in self.tables_._asdict().items()}

    @classmethod
    def from_state(cls, meta: dict, arrays: dict[str, np.ndarray]) -> "TreeRegressor":
        """Rebuild a regressor saved by :meth:`state`."""
        if meta.get("kind", "regressor") != "regressor":
            raise ConfigError(f"saved tree is a {meta.get('kind')!r}, not a regressor")
        model = cls(meta["feature_names"], meta["feature_kinds"],
                    RegressionSettings.from_dict(meta["settings"]))
        missing = [f for f in RegressorTables._fields if f not in arrays]
        if missing:
            raise ModelFileError(f"saved tree lacks table {missing[0]!r}")
        # copies: the kernels write in place and trust the tables' shapes
        tables = RegressorTables(**{f: np.array(arrays[f], copy=True)
                                    for f in RegressorTables._fields})
        model.tables_ = check_tables(tables, model.settings, model.feature_kinds)
        return model


def warm_up() -> None:
    """Load (or, the first time, compile) the regression kernels: every leaf model and
    detector, numeric and categorical features, missing values, a split and a new
    category."""
    X = np.array([[0.5, 0.0], [0.25, 1.0], [np.nan, 1.0], [0.75, np.nan], [0.1, 2.0]])
    y = np.array([1.0, 2.0, 1.5, 0.5, 3.0])
    for leaf_model, detector in (("mean", "off"), ("linear", "page_hinkley"),
                                 ("adaptive", "adwin")):
        model = TreeRegressor(["a", "b"], ["numeric", "category"],
                              RegressionSettings(leaf_model=leaf_model, grace_period=1,
                                                 min_branch_records=1, detector=detector))
        model.learn(X, y)
        model.predict(X)
    model._make_room()     # the room checks run only when a learn call fills a table
