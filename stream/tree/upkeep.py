"""What the Python faces of both trees do with their tables around kernel calls: run a
kernel over a batch until every record is learned, collect the drift events it left,
and grow the tables for new category codes or when the kernel found no room.

:class:`TableUpkeep` is the shared base of :class:`stream.classify.TreeClassifier`
and :class:`stream.regress.TreeRegressor`; each names its own table functions in
``_ops``.
"""

from __future__ import annotations

import dataclasses
from typing import Callable, NamedTuple

import numpy as np

from .layout import (EV_AFTER, EV_BEFORE, EV_KIND, EV_NODE, EV_OTHER, EV_RECORD,
                     EVENT_NAMES, S_ALARMS, S_ALTS, S_CHILD_USED, S_DEACTIVATED, S_DROPS,
                     S_EVENTS, S_FREE_NODES, S_NODES, S_SPLITS, S_STARTS, S_SWAPS,
                     S_WANTS_SLOTS)
from .views import MainTreeViews


@dataclasses.dataclass(frozen=True)
class DriftEvent:
    """Something a drift detector did: ``kind`` is alarm, start (an alternate subtree
    began growing beside ``node``), swap (the alternate ``other`` replaced ``node``'s
    subtree) or drop (the alternate ``other`` was given up). ``record`` counts the
    records learned before the event; ``before``/``after`` are error rates (alarm: the
    node's rate before, and the detector's recent rate; swap/drop: the node's and the
    alternate's); for a regression tree, mean normalised absolute errors
    (:mod:`stream.regress.drift`). ``path`` is the node's path as rule conditions."""

    kind: str
    node: int
    record: int
    other: int
    before: float
    after: float
    path: tuple | None = None


class TableOps(NamedTuple):
    """A tree's table functions: Python's ``capacities`` and ``grow``, the kernels'
    ``has_room``, ``worst_case`` (nodes, events and child entries one record may need
    first) and ``slots_needed`` (statistics slots the memory budget allows, plus
    what one record may activate)."""

    capacities: Callable
    grow: Callable
    has_room: Callable
    worst_case: Callable
    slots_needed: Callable


class TableUpkeep(MainTreeViews):
    """Events and capacity of a tree whose state is ``tables_``."""

    _ops: TableOps
    _category_columns: np.ndarray
    _categories: dict
    events_: list

    def counters(self) -> dict:
        """Growth and drift counters: splits, deactivated leaves, alarms, alternates."""
        s = self.tables_.state
        return {"splits": int(s[S_SPLITS]), "deactivated": int(s[S_DEACTIVATED]),
                "drift_alarms": int(s[S_ALARMS]), "alternates_started": int(s[S_STARTS]),
                "alternates_swapped": int(s[S_SWAPS]), "alternates_dropped": int(s[S_DROPS]),
                "alternates_growing": int(s[S_ALTS])}

    def take_events(self) -> list[DriftEvent]:
        """Drift events since the last call, oldest first, each with the node's path as
        conditions, read when the event was collected (the ids of a subtree swapped out
        or dropped are reused from the next record on, possibly within the same call
        that learned)."""
        events, self.events_ = self.events_, []
        return events

    def _learn_all(self, n: int, learn_from: Callable[[int], int]) -> None:
        """Call ``learn_from(first record)`` until all ``n`` records are learned; it
        returns the first record it did not handle. Between calls, collect events and
        make room."""
        done = 0
        while True:
            done = learn_from(done)
            self._collect_events()
            waiting = bool(self.tables_.state[S_WANTS_SLOTS])
            if done >= n and not waiting:
                return
            if waiting or not self._ops.has_room(self.tables_):
                self._make_room()

    def _collect_events(self) -> None:
        # the kernel returns before it recycles the nodes of pending events: their paths
        # can be read now, and only now
        from .paths import node_conditions

        t = self.tables_
        for e in range(int(t.state[S_EVENTS])):
            node = int(t.events_i[e, EV_NODE])
            self.events_.append(DriftEvent(
                EVENT_NAMES[int(t.events_i[e, EV_KIND])], node,
                int(t.events_i[e, EV_RECORD]), int(t.events_i[e, EV_OTHER]),
                float(t.events_f[e, EV_BEFORE]), float(t.events_f[e, EV_AFTER]),
                node_conditions(self, node, self._categories)))
        t.state[S_EVENTS] = 0

    def _fit_categories(self, X: np.ndarray) -> None:
        """Grow the category capacity to the highest code in ``X`` (doubling, at least)."""
        if not self._category_columns.size or not X.shape[0]:
            return
        codes = X[:, self._category_columns]
        if np.isnan(codes).all():
            return
        highest = int(np.nanmax(codes))
        capacity = self._ops.capacities(self.tables_)["cats"]
        if highest >= capacity:
            self.tables_ = self._ops.grow(self.tables_, cats=max(highest + 1, 2 * capacity))

    def _make_room(self) -> None:
        """Enlarge whatever table ``has_room`` found short (doubling, at least)."""
        ops, t = self._ops, self.tables_
        cap = ops.capacities(t)
        nodes, events, children = (int(v) for v in ops.worst_case(t)[:3])
        nodes_free = cap["nodes"] - int(t.state[S_NODES]) + int(t.state[S_FREE_NODES])
        need_nodes = nodes_free <= nodes or \
            t.events_i.shape[0] - int(t.state[S_EVENTS]) <= events
        need_slots = int(ops.slots_needed(t))
        short = cap["slots"] < need_slots or t.state[S_WANTS_SLOTS]
        self.tables_ = ops.grow(
            t,
            nodes=2 * cap["nodes"] + nodes + events if need_nodes else 0,
            slots=max(2 * cap["slots"], need_slots) if short else 0,
            children=(2 * cap["children"] + children
                      if cap["children"] - t.state[S_CHILD_USED] <= children else 0),
        )
        if not ops.has_room(self.tables_):  # pragma: no cover - a bug, not a data condition
            raise RuntimeError("tables did not grow enough")
