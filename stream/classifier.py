"""TreeClassifier: the Python face of the compiled Hoeffding tree.

>>> import numpy as np
>>> from stream.classifier import TreeClassifier
>>> X = np.array([[0.1], [0.9], [0.2], [0.8]])
>>> y = np.array([0, 1, 0, 1], dtype=np.int32)
>>> model = TreeClassifier(["pressure"], ["numeric"])
>>> scored = model.learn(X, y, classes=["low", "high"])
>>> scored.pred.tolist()          # each record is scored before it is learned
[-1, 0, 0, 0]
"""

from __future__ import annotations

import dataclasses

import numpy as np

from .classifier_kernel import has_room, leaf_cap, learn_batch, predict_batch, worst_case
from .errors import ConfigError
from .settings import TreeSettings
from .tables import (EVENT_NAMES, EV_AFTER, EV_BEFORE, EV_KIND, EV_NODE, EV_OTHER,
                     EV_RECORD, S_ALARMS, S_ALTS, S_CHILD_USED, S_CLASSES_SEEN,
                     S_DEACTIVATED, S_DROPS, S_EVENTS, S_FREE_NODES, S_LEAVES, S_NODES,
                     S_PRUNED, S_SPLITS, S_STARTS, S_SWAPS, ClassifierTables, allocate,
                     capacities, grow)
from .tree_views import MainTreeViews, check_features


@dataclasses.dataclass(frozen=True)
class DriftEvent:
    """Something a drift detector did: ``kind`` is alarm, start (an alternate subtree
    began growing beside ``node``), swap (the alternate ``other`` replaced ``node``'s
    subtree) or drop (the alternate ``other`` was given up). ``record`` counts the
    records learned before the event; ``before``/``after`` are error rates (alarm: the
    node's rate before, and the detector's recent rate; swap/drop: the branch's and the
    alternate's)."""

    kind: str
    node: int
    record: int
    other: int
    before: float
    after: float
    path: tuple | None = None


@dataclasses.dataclass
class Scored:
    """Per-record output of scoring: class code (-1 = none yet), its probability, and
    the node id of the leaf that scored the record."""

    pred: np.ndarray
    confidence: np.ndarray
    leaf: np.ndarray


class TreeClassifier(MainTreeViews):
    """An incremental Hoeffding tree over numeric and categorical features.

    Parameters
    ----------
    feature_names
        Names of the columns of ``X``.
    feature_kinds
        ``"numeric"`` or ``"category"`` per column; category values arrive as integer
        codes (0, 1, 2, ...) stored as floats. NaN is a missing value everywhere.
    settings
        How the tree grows; :class:`stream.settings.TreeSettings` defaults if omitted.
    """

    def __init__(self, feature_names: list[str], feature_kinds: list[str],
                 settings: TreeSettings | None = None) -> None:
        check_features(feature_names, feature_kinds)
        self.settings = settings or TreeSettings()
        self.feature_names = list(feature_names)
        self.feature_kinds = list(feature_kinds)
        self.classes_: list[str] = []
        self.events_: list[DriftEvent] = []
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
        X = np.ascontiguousarray(X, dtype=np.float64)
        y = np.ascontiguousarray(y, dtype=np.int32)
        if X.ndim != 2 or X.shape[1] != len(self.feature_names):
            raise ConfigError(f"X must have {len(self.feature_names)} columns, got shape "
                              f"{X.shape}")
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
        done = 0
        while True:
            done = learn_batch(self.tables_, X, y, done, rank, scored.pred,
                               scored.confidence, scored.leaf)
            self._collect_events()
            if done >= n:
                return scored
            if not has_room(self.tables_):
                self._make_room()

    def take_events(self) -> list[DriftEvent]:
        """Drift events since the last call, oldest first, each with the node's path as
        conditions, read when the event was collected (node ids are recycled later)."""
        events, self.events_ = self.events_, []
        return events

    def _collect_events(self) -> None:
        t = self.tables_
        count = int(t.state[S_EVENTS])
        from .rules import node_conditions

        for e in range(count):
            node = int(t.events_i[e, EV_NODE])
            self.events_.append(DriftEvent(
                EVENT_NAMES[int(t.events_i[e, EV_KIND])], node,
                int(t.events_i[e, EV_RECORD]), int(t.events_i[e, EV_OTHER]),
                float(t.events_f[e, EV_BEFORE]), float(t.events_f[e, EV_AFTER]),
                node_conditions(self, node, getattr(self, "_categories", {}))))
        t.state[S_EVENTS] = 0

    def predict(self, X: np.ndarray) -> Scored:
        """Score rows of ``X`` without learning."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        n = X.shape[0]
        scored = Scored(np.empty(n, np.int32), np.empty(n), np.empty(n, np.int32))
        predict_batch(self.tables_, X, self._rank(), scored.pred, scored.confidence,
                      scored.leaf)
        return scored

    # ------------------------------------------------------------------ capacity
    def _set_classes(self, classes: list[str]) -> None:
        classes = [str(c) for c in classes]
        if classes[:len(self.classes_)] != self.classes_:
            raise ConfigError("class labels may only be appended, got "
                              f"{classes!r} after {self.classes_!r}")
        self.classes_ = classes
        capacity = capacities(self.tables_)["classes"]
        if len(classes) > capacity:
            self.tables_ = grow(self.tables_, classes=max(len(classes), 2 * capacity))

    def _fit_categories(self, X: np.ndarray) -> None:
        if not self._category_columns.size or not X.shape[0]:
            return
        codes = X[:, self._category_columns]
        if np.isnan(codes).all():
            return
        highest = int(np.nanmax(codes))
        capacity = capacities(self.tables_)["cats"]
        if highest >= capacity:
            self.tables_ = grow(self.tables_, cats=max(highest + 1, 2 * capacity))

    def _make_room(self) -> None:
        """Enlarge whatever table :func:`has_room` found short (doubling, at least)."""
        t = self.tables_
        cap = capacities(t)
        nodes, events, children, _ = (int(v) for v in worst_case(t))
        nodes_free = cap["nodes"] - int(t.state[S_NODES]) + int(t.state[S_FREE_NODES])
        need_nodes = nodes_free <= nodes or \
            t.events_i.shape[0] - int(t.state[S_EVENTS]) <= events
        need_slots = min(int(t.state[S_LEAVES]), leaf_cap(t)) + nodes
        self.tables_ = grow(
            t,
            nodes=2 * cap["nodes"] + nodes + events if need_nodes else 0,
            slots=max(2 * cap["slots"], need_slots) if cap["slots"] < need_slots else 0,
            children=(2 * cap["children"] + children
                      if cap["children"] - t.state[S_CHILD_USED] <= children else 0),
        )
        if not has_room(self.tables_):  # pragma: no cover - a bug, not a data condition
            raise RuntimeError("tables did not grow enough")

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
        model.tables_ = ClassifierTables(**{f: np.ascontiguousarray(arrays[f])
                                            for f in ClassifierTables._fields})
        model.classes_ = list(meta["classes"])
        return model

    # ------------------------------------------------------------------ introspection
    def counters(self) -> dict:
        """Growth counters: splits, prepruned attempts, deactivated leaves, classes seen."""
        s = self.tables_.state
        return {"splits": int(s[S_SPLITS]), "prepruned": int(s[S_PRUNED]),
                "deactivated": int(s[S_DEACTIVATED]), "classes_seen": int(s[S_CLASSES_SEEN]),
                "drift_alarms": int(s[S_ALARMS]), "alternates_started": int(s[S_STARTS]),
                "alternates_swapped": int(s[S_SWAPS]), "alternates_dropped": int(s[S_DROPS]),
                "alternates_growing": int(s[S_ALTS])}
