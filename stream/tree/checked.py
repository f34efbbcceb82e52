"""Loaded tree tables checked before any compiled code touches them.

A model file's checksums prove the bytes are those written, not that they make a tree:
anyone can edit an array and sign it again. The record loops index without bounds
checks, so every index and counter they follow is checked here against the table sizes
and the tree's structure: counters within their tables; node fields in range; children,
alternates and parents naming nodes in use; every node reached at most once from the
main root and the alternates' roots (no cycle, no shared subtree); the free stacks
holding distinct ids that no live node uses; detector rows and bucket counts within
their tables. A failure is a :class:`~stream.errors.ModelFileError` naming the field.
"""

from __future__ import annotations

import numpy as np

from stream.errors import ModelFileError

from .drift import A_LEVELS, ADWIN_LEVELS
from .layout import (ALT, ALT_OF, CHILD_START, DEAD, DEPTH, DET, EQUALS, FEATURE, FREE, KIND,
                     LEAF, MAIN, N_CHILDREN, PARENT, S_CHILD_USED, S_EVENTS, S_FREE_DETS,
                     S_FREE_NODES, S_FREE_TOP, S_MAX_DEPTH, S_NODES, S_ROOT, SLOT, STATUS)


def _refuse(field: str, why: str) -> ModelFileError:
    return ModelFileError(f"saved tree: {field} {why}")


def check_like(t, fresh, fields: tuple[str, ...]) -> None:
    """Refuse tables ``t`` whose arrays differ in type or rank from ``fresh`` (tables
    allocated for the same settings and features), or whose settings, counter vector or
    feature map differ from them."""
    for name in fields:
        a, ref = getattr(t, name), getattr(fresh, name)
        if not isinstance(a, np.ndarray) or a.dtype != ref.dtype or a.ndim != ref.ndim:
            raise _refuse(f"table {name!r}", "has the wrong type or rank")
    if t.cfg_i.shape != fresh.cfg_i.shape or t.cfg_f.shape != fresh.cfg_f.shape \
            or t.state.shape != fresh.state.shape:
        raise ModelFileError("saved tree: settings or counters have the wrong length")
    if not (np.array_equal(t.cfg_i, fresh.cfg_i) and np.array_equal(t.cfg_f, fresh.cfg_f)):
        raise ModelFileError("saved tree: its tables were built with other settings")
    if t.fmap.shape != fresh.fmap.shape or not np.array_equal(t.fmap[:, :2], fresh.fmap[:, :2]):
        raise ModelFileError("saved tree: its tables were built for other features")


def check_structure(t, n_features: int, detector_on: bool) -> None:
    """Refuse tables ``t`` (either tree's) whose indices or structure do not hold.

    ``t`` needs ``node_i``, ``child_table``, ``state``, ``free_slots``, ``free_nodes``,
    ``free_dets``, ``events_i``, ``adwin_counts`` and ``adwin_state``.
    """
    s = t.state
    nodes, slots = t.node_i.shape[0], t.free_slots.shape[0]
    n_nodes, top, used = int(s[S_NODES]), int(s[S_FREE_TOP]), int(s[S_CHILD_USED])
    free_nodes, free_dets = int(s[S_FREE_NODES]), int(s[S_FREE_DETS])
    counters = {"state[nodes]": 1 <= n_nodes <= nodes, "state[free slots]": 0 <= top <= slots,
                "state[child entries]": 0 <= used <= t.child_table.shape[0],
                "state[free nodes]": 0 <= free_nodes <= n_nodes,
                "state[free detectors]": 0 <= free_dets <= nodes,
                "state[events]": 0 <= int(s[S_EVENTS]) <= t.events_i.shape[0],
                "state[root]": 0 <= int(s[S_ROOT]) < n_nodes,
                "state[max depth]": 0 <= int(s[S_MAX_DEPTH]) <= nodes}
    for field, ok in counters.items():
        if not ok:
            raise _refuse(field, "does not fit its tables")
    node = t.node_i[:n_nodes]
    status, kind = node[:, STATUS], node[:, KIND]
    live = status < DEAD
    _in_range("node status", status, MAIN, FREE)
    _in_range("node kind", kind, LEAF, EQUALS)
    for column, name in ((PARENT, "parent"), (ALT, "alternate"), (ALT_OF, "alternate of")):
        _in_range(f"node {name}", node[live, column], -1, n_nodes - 1)
    _in_range("node depth", node[live, DEPTH], 0, int(s[S_MAX_DEPTH]))
    _in_range("node slot", node[live, SLOT], -1, slots - 1)
    _in_range("node feature", node[live & (kind != LEAF), FEATURE], 0, n_features - 1)
    _in_range("node feature", node[live & (kind == LEAF), FEATURE], -1, n_features - 1)
    if detector_on:
        _in_range("node detector", node[live, DET], -1, nodes - 1)
    branches = node[live & (kind != LEAF)]
    start, count = branches[:, CHILD_START], branches[:, N_CHILDREN]
    if ((start < 0) | (count < 1) | (start + count > used)).any():
        raise _refuse("node children", "lie outside the child table")
    _in_range("child table", t.child_table[:used], -1, n_nodes - 1)
    _reached_once(node, t.child_table, int(s[S_ROOT]), live)
    _distinct("free slot stack", t.free_slots[:top], 0, slots - 1)
    taken = node[live, SLOT]
    if np.intersect1d(taken[taken >= 0], t.free_slots[:top]).size:
        raise _refuse("free slot stack", "lists a slot a live node uses")
    _distinct("free node stack", t.free_nodes[:free_nodes], 0, n_nodes - 1)
    if (status[t.free_nodes[:free_nodes]] < DEAD).any():
        raise _refuse("free node stack", "lists a node in use")
    _distinct("free detector stack", t.free_dets[:free_dets], 0, nodes - 1)
    if detector_on and np.intersect1d(node[live & (node[:, DET] >= 0), DET],
                                      t.free_dets[:free_dets]).size:
        raise _refuse("free detector stack", "lists a detector a live node uses")
    if t.adwin_state.shape[0]:
        buckets = t.adwin_buckets.shape[2]
        _in_range("ADWIN bucket counts", t.adwin_counts, 0, buckets)
        _in_range("ADWIN levels", t.adwin_state[:, A_LEVELS], 0, ADWIN_LEVELS)


def _in_range(field: str, values: np.ndarray, low: float, high: float) -> None:
    values = np.asarray(values)
    if values.size and (np.isnan(values).any() if values.dtype.kind == "f" else False):
        raise _refuse(field, "holds NaN")
    if values.size and ((values < low) | (values > high)).any():
        bad = values[(values < low) | (values > high)][0]
        raise _refuse(field, f"holds {bad!r}, outside {low}..{high}")


def _distinct(field: str, values: np.ndarray, low: int, high: int) -> None:
    _in_range(field, values, low, high)
    if np.unique(values).size != values.size:
        raise _refuse(field, "lists an id twice")


def _reached_once(node: np.ndarray, children: np.ndarray, root: int, live: np.ndarray) -> None:
    """Walk the main tree and every alternate subtree: each node at most once."""
    if not live[root]:
        raise _refuse("state[root]", "names a node not in use")
    seen = np.zeros(node.shape[0], bool)
    stack = [root] + [int(i) for i in np.flatnonzero(live & (node[:, ALT_OF] >= 0))]
    while stack:
        i = stack.pop()
        if seen[i]:
            raise _refuse("node children", f"reach node {i} twice (a cycle or a shared "
                          "subtree)")
        if not live[i]:
            raise _refuse("node children", f"lead to node {i}, which is not in use")
        seen[i] = True
        if node[i, KIND] != LEAF:
            start = int(node[i, CHILD_START])
            stack.extend(int(c) for c in children[start:start + int(node[i, N_CHILDREN])]
                         if c >= 0)
        if node[i, ALT] >= 0 and node[node[i, ALT], ALT_OF] != i:
            raise _refuse("node alternate", f"of node {i} does not point back to it")
