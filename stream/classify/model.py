"""TreeClassifier: the Python face of the compiled Hoeffding tree.

>>> import numpy as np
>>> from stream.classify import TreeClassifier, TreeSettings
>>> X = np.array([[0.1], [0.9], [0.2], [0.8]])
>>> y = np.array([0, 1, 0, 1], dtype=np.int32)
>>> model = TreeClassifier(["pressure"], ["numeric"], TreeSettings(leaf_model="majority"))
>>> scored = model.learn(X, y, classes=["low", "high"])
>>> scored.pred.tolist()      # each record is scored before it is learned (-1: no guess yet)
[-1, 0, 1, 0]

The third record meets a tie (one "low", one "high"): ties go to the label that sorts
first, "high" (code 1).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from stream.errors import ConfigError, ModelFileError
from stream.tree.upkeep import DriftEvent, TableOps, TableUpkeep
from stream.checks import CATEGORY_LIMIT
from stream.tree.inputs import check_features, check_rows

from .kernel import has_room, learn_batch, predict_batch, slots_needed, worst_case
from .settings import TreeSettings
from .tables import (S_CLASSES_SEEN, S_PRUNED, ClassifierTables, allocate, capacities,
                     check_tables, grow)


@dataclasses.dataclass
class Scored:
    """Per-record output of scoring: class code (-1 = none yet), its probability, and
    the node id of the leaf that scored the record."""

    pred: np.ndarray
    confidence: np.ndarray
    leaf: np.ndarray


class TreeClassifier(TableUpkeep):
    """An incremental Hoeffding tree over numeric and categorical features.

    Parameters
    ----------
    feature_names
        Names of the columns of ``X``.
    feature_kinds
        ``"numeric"`` or ``"category"`` per column; category values arrive as integer
        codes (0, 1, 2, ...) stored as floats. NaN is a missing value everywhere.
    settings
        How the tree grows; :class:`stream.classify.settings.TreeSettings` defaults if omitted.
    """

    _ops = TableOps(capacities, grow, has_room, worst_case, slots_needed)

    def __init__(self, feature_names: list[str], feature_kinds: list[str],
                 settings: TreeSettings | None = None) -> None:
        check_features(feature_names, feature_kinds)
        self.settings = settings or TreeSettings()
        self.feature_names = list(feature_names)
        self.feature_kinds = list(feature_kinds)
        self.classes_: list[str] = []
        self.events_: list[DriftEvent] = []
        self._categories: dict[str, list[str]] = {}
        self.tables_: ClassifierTables = allocate(self.settings, self.feature_kinds)
        self._category_columns = np.array(
            [j for j, k in enumerate(self.feature_kinds) if k == "category"], np.int64)

    # ------------------------------------------------------------------ learning
    def learn(self, X: np.ndarray, y: np.ndarray, classes: list[str],
              categories: dict[str, list[str]] | None = None) -> Scored:
        """Score each row of ``X`` with the current tree, then learn it.

        ``y`` holds class codes indexing ``classes`` (the labels known so far; the list
        may only grow between calls). ``categories`` (labels per categorical feature)
        only names category values in the paths of drift events.
        """
        self._categories = categories or {}
        X = check_rows(X, self.feature_names, self._category_columns)
        y = np.ascontiguousarray(y, dtype=np.int32)
        if y.shape[0] != X.shape[0]:
            raise ConfigError(f"y must have {X.shape[0]} values, got {y.shape[0]}")
        self._set_classes(classes)
        if y.size and (y.min() < 0 or y.max() >= len(self.classes_)):
            raise ConfigError(f"class codes must be in 0..{len(self.classes_) - 1}, got "
                              f"{int(y.min()) if y.min() < 0 else int(y.max())}")
        self._fit_categories(X)
        n = X.shape[0]
        scored = Scored(np.empty(n, np.int32), np.empty(n), np.empty(n, np.int32))
        rank = self._rank()
        self._learn_all(n, lambda start: learn_batch(self.tables_, X, y, start, rank,
                                                     scored.pred, scored.confidence,
                                                     scored.leaf))
        return scored

    def predict(self, X: np.ndarray) -> Scored:
        """Score rows of ``X`` without learning."""
        X = check_rows(X, self.feature_names, self._category_columns)
        n = X.shape[0]
        scored = Scored(np.empty(n, np.int32), np.empty(n), np.empty(n, np.int32))
        predict_batch(self.tables_, X, self._rank(), scored.pred, scored.confidence,
                      scored.leaf)
        return scored

    # ------------------------------------------------------------------ capacity
    def _set_classes(self, classes: list[str]) -> None:
        classes = [str(c) for c in classes]
        if len(classes) > CATEGORY_LIMIT:
            raise ConfigError(f"a tree takes at most {CATEGORY_LIMIT:,} classes, got "
                              f"{len(classes):,}")
        if classes[:len(self.classes_)] != self.classes_:
            raise ConfigError("class labels may only be appended, got "
                              f"{classes!r} after {self.classes_!r}")
        self.classes_ = classes
        capacity = capacities(self.tables_)["classes"]
        if len(classes) > capacity:
            self.tables_ = grow(self.tables_, classes=max(len(classes), 2 * capacity))

    def _rank(self) -> np.ndarray:
        rank = np.zeros(capacities(self.tables_)["classes"], np.int32)
        order = sorted(range(len(self.classes_)), key=lambda k: self.classes_[k])
        for r, k in enumerate(order):
            rank[k] = r
        return rank

    # ------------------------------------------------------------------ state
    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        """Everything needed to resume: JSON-able meta and the tables (no pickle)."""
        meta = {"settings": self.settings.to_dict(), "feature_names": self.feature_names,
                "feature_kinds": self.feature_kinds, "classes": self.classes_}
        return meta, {name: np.asarray(a) for name, a in self.tables_._asdict().items()}

    @classmethod
    def from_state(cls, meta: dict, arrays: dict[str, np.ndarray]) -> "TreeClassifier":
        """Rebuild a classifier saved by :meth:`state`."""
        model = cls(meta["feature_names"], meta["feature_kinds"],
                    TreeSettings.from_dict(meta["settings"]))
        missing = [f for f in ClassifierTables._fields if f not in arrays]
        if missing:
            raise ConfigError(f"saved tree lacks table {missing[0]!r}")
        model.tables_ = check_tables(ClassifierTables(**{f: arrays[f]
                                                         for f in ClassifierTables._fields}),
                                     model.settings, list(meta["feature_kinds"]))
        model.classes_ = list(meta["classes"])
        if len(model.classes_) > model.tables_.counts.shape[1]:
            raise ModelFileError("saved tree: it names more classes than its tables hold")
        return model

    # ------------------------------------------------------------------ introspection
    def counters(self) -> dict:
        """The shared counters plus prepruned split attempts and classes seen."""
        s = self.tables_.state
        return {**super().counters(), "prepruned": int(s[S_PRUNED]),
                "classes_seen": int(s[S_CLASSES_SEEN])}
