"""Compiled operations on the node layout both trees share (:mod:`stream.tree.layout`):
routing a record through a branch, the birth of leaves, giving back an statistics slot,
walks, death, swap and recycling of subtrees, and the event buffer.

Contents
--------
heaviest_child / next_node
    Which child of a branch a record goes to; missing values follow the heaviest child.
place_leaf / take_detector_row / deactivate
    A new leaf's id and node columns; its detector row; a leaf gives its statistics slot
    back (its own statistics and model stay).
push_children / kill_subtree / recycle_dead / set_status / swap_in_alternate
    Walks of a subtree. A replaced or dropped subtree dies at once (its slots and
    detectors are freed); its node ids are recycled at the start of the next record,
    after Python has read the events that name them. An alternate swapped in takes its
    node's place.
tree_shape
    Nodes, leaves and depth of the main tree.
add_event
    An alarm, start, swap or drop, appended for Python to collect after the call.

Functions take either the individual tables they touch or a tree's whole tables ``t``
(a :class:`stream.classify.tables.ClassifierTables` or :class:`stream.regress.tables.
RegressorTables`; numba compiles one version for each).
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit

from .layout import (ALT, ALT_OF, BRANCH, CHILD_START, CREATED, DEAD, DEPTH, DET, EQUALS,
                     EV_AFTER, EV_BEFORE, EV_KIND, EV_NODE, EV_OTHER, EV_RECORD, FEATURE,
                     FREE, KIND, LEAF, N_CHILDREN, NUMERIC, PARENT, S_ACTIVE, S_ALTS,
                     S_CREATED, S_DEAD, S_EVENTS, S_FREE_DETS, S_FREE_NODES, S_FREE_TOP,
                     S_LEAVES, S_MAX_DEPTH, S_NODES, S_ROOT, S_SWAPS, S_WANTS_SLOTS, SLOT,
                     STATUS, SWAPPED,
                     THRESHOLD, WEIGHT)


# ---------------------------------------------------------------- routing

@njit(borrows=True)
def heaviest_child(node_i, node_f, child_table, n: int) -> int:
    """The child that has seen the most weight (ties: the first); missing values go there."""
    best = -1
    best_weight = -1.0
    start = node_i[n, CHILD_START]
    for i in range(node_i[n, N_CHILDREN]):
        c = child_table[start + i]
        if c >= 0 and node_f[c, WEIGHT] > best_weight:
            best = c
            best_weight = node_f[c, WEIGHT]
    return best


@njit
def next_node(node_i, node_f, child_table, n: int, x) -> int:
    """The child of branch ``n`` for record ``x``, or -1 for a category with no branch yet."""
    v = x[node_i[n, FEATURE]]
    if math.isnan(v):
        return heaviest_child(node_i, node_f, child_table, n)
    start = node_i[n, CHILD_START]
    kind = node_i[n, KIND]
    if kind == NUMERIC:
        return child_table[start] if v <= node_f[n, THRESHOLD] else child_table[start + 1]
    if kind == EQUALS:
        return child_table[start] if v == node_f[n, THRESHOLD] else child_table[start + 1]
    code = int(v)
    if code < node_i[n, N_CHILDREN]:
        return child_table[start + code]
    return -1


# ---------------------------------------------------------------- birth and slots

@njit
def place_leaf(t, parent: int, branch: int, status: int, record: int) -> int:
    """A node id (a recycled one first) made an inactive leaf under ``parent`` at child
    position ``branch``, with zeroed node columns and no detector yet."""
    top = t.state[S_FREE_NODES]
    if top > 0:
        n = t.free_nodes[top - 1]
        t.state[S_FREE_NODES] = top - 1
    else:
        n = t.state[S_NODES]
        t.state[S_NODES] = n + 1
    t.state[S_LEAVES] += 1
    t.state[S_CREATED] += 1
    t.node_i[n, :] = 0
    t.node_f[n, :] = 0.0
    t.node_i[n, KIND] = LEAF
    t.node_i[n, FEATURE] = -1
    t.node_i[n, PARENT] = parent
    t.node_i[n, BRANCH] = branch
    t.node_i[n, DEPTH] = t.node_i[parent, DEPTH] + 1 if parent >= 0 else 0
    t.node_i[n, CREATED] = record
    t.node_i[n, SLOT] = -1
    t.node_i[n, ALT] = -1
    t.node_i[n, ALT_OF] = -1
    t.node_i[n, SWAPPED] = -1
    t.node_i[n, STATUS] = status
    t.node_i[n, DET] = -1
    if t.node_i[n, DEPTH] > t.state[S_MAX_DEPTH]:
        t.state[S_MAX_DEPTH] = t.node_i[n, DEPTH]
    return n


@njit
def take_detector_row(t, n: int) -> None:
    """Give node ``n`` a detector row from the free stack (the caller resets it)."""
    top = t.state[S_FREE_DETS] - 1
    t.state[S_FREE_DETS] = top
    t.node_i[n, DET] = t.free_dets[top]


@njit
def deactivate(t, n: int) -> None:
    """Give leaf ``n``'s statistics slot back to the free stack (no-op when it has none)."""
    s = t.node_i[n, SLOT]
    if s < 0:
        return
    top = t.state[S_FREE_TOP]
    t.free_slots[top] = s
    t.state[S_FREE_TOP] = top + 1
    t.node_i[n, SLOT] = -1
    t.state[S_ACTIVE] -= 1


@njit
def spare_slots(state, watching: bool) -> int:
    """Slots kept free for the leaves one record may activate outright: a new branch
    per level and an alternate per node of each tree's path (``watching``: drift
    detection is on, so alternates grow)."""
    depth = state[S_MAX_DEPTH] + 2
    trees = 1 + state[S_ALTS] + depth if watching else 1
    return trees * (depth + 2)


@njit
def slot_to_spare(state, watching: bool) -> bool:
    """Whether a leaf may take a slot now: one is free beyond the spare ones. If not,
    marks that leaves wait for slots: the record loop returns after the record, Python
    grows the slot tables and the next call activates them before any record reads
    them (the children of a split into many branches never reserve slots ahead)."""
    if state[S_FREE_TOP] > spare_slots(state, watching):
        return True
    state[S_WANTS_SLOTS] = 1
    return False


# ---------------------------------------------------------------- walks, death and recycling

@njit
def push_children(node_i, child_table, n: int, stack, top: int) -> int:
    """Push branch ``n``'s children on ``stack`` (above ``top``); returns the new top."""
    start = node_i[n, CHILD_START]
    for i in range(node_i[n, N_CHILDREN]):
        c = child_table[start + i]
        if c >= 0:
            stack[top] = c
            top += 1
    return top


@njit
def kill_subtree(t, root: int) -> None:
    """Mark every node under ``root`` (alternates hanging there included) dead: free their
    statistics slots and detectors at once. Their ids are recycled by :func:`recycle_dead`."""
    stack = np.empty(t.state[S_NODES] + 1, np.int64)
    stack[0] = root
    top = 1
    while top > 0:
        top -= 1
        n = stack[top]
        if t.node_i[n, STATUS] >= DEAD:
            continue
        t.node_i[n, STATUS] = DEAD
        t.state[S_DEAD] += 1
        d = t.node_i[n, DET]
        if d >= 0:
            t.free_dets[t.state[S_FREE_DETS]] = d
            t.state[S_FREE_DETS] += 1
            t.node_i[n, DET] = -1
        a = t.node_i[n, ALT]
        if a >= 0:
            t.node_i[n, ALT] = -1
            t.state[S_ALTS] -= 1
            stack[top] = a
            top += 1
        if t.node_i[n, KIND] == LEAF:
            deactivate(t, n)
            t.state[S_LEAVES] -= 1
            continue
        top = push_children(t.node_i, t.child_table, n, stack, top)


@njit
def recycle_dead(t) -> None:
    """Put dead nodes' ids on the free stack (lowest id on top), so new nodes reuse them.
    Runs at the start of the record after the deaths, once their events were read."""
    top = t.state[S_FREE_NODES]
    for n in range(t.state[S_NODES] - 1, -1, -1):
        if t.node_i[n, STATUS] == DEAD:
            t.node_i[n, STATUS] = FREE
            t.free_nodes[top] = n
            top += 1
    t.state[S_FREE_NODES] = top
    t.state[S_DEAD] = 0


@njit
def set_status(t, root: int, status: int) -> None:
    """Give every node under ``root`` (not the alternates hanging there) ``status``."""
    stack = np.empty(t.state[S_NODES] + 1, np.int64)
    stack[0] = root
    top = 1
    while top > 0:
        top -= 1
        n = stack[top]
        t.node_i[n, STATUS] = status
        if t.node_i[n, KIND] == LEAF:
            continue
        top = push_children(t.node_i, t.child_table, n, stack, top)


@njit
def swap_in_alternate(t, n: int, record: int) -> int:
    """Put ``n``'s alternate where ``n`` is; ``n``'s subtree dies. Returns the new node."""
    a = t.node_i[n, ALT]
    t.node_i[n, ALT] = -1
    t.state[S_ALTS] -= 1
    owner = t.node_i[n, ALT_OF]
    if owner >= 0:                         # n is itself an alternate: a replaces it there
        t.node_i[owner, ALT] = a
        t.node_i[a, ALT_OF] = owner
    else:
        t.node_i[a, ALT_OF] = -1
        if n == t.state[S_ROOT]:
            t.state[S_ROOT] = a
        else:
            parent = t.node_i[n, PARENT]
            t.child_table[t.node_i[parent, CHILD_START] + t.node_i[n, BRANCH]] = a
    set_status(t, a, t.node_i[n, STATUS])
    t.node_i[a, SWAPPED] = record
    kill_subtree(t, n)
    t.state[S_SWAPS] += 1
    return a


@njit
def tree_shape(t):
    """(nodes, leaves, depth) of the main tree; depth counts edges from its root."""
    stack = np.empty(t.state[S_NODES] + 1, np.int64)
    root = t.state[S_ROOT]
    stack[0] = root
    top = 1
    nodes = 0
    leaves = 0
    deepest = 0
    while top > 0:
        top -= 1
        n = stack[top]
        nodes += 1
        d = t.node_i[n, DEPTH] - t.node_i[root, DEPTH]
        if d > deepest:
            deepest = d
        if t.node_i[n, KIND] == LEAF:
            leaves += 1
            continue
        top = push_children(t.node_i, t.child_table, n, stack, top)
    return nodes, leaves, deepest


# ---------------------------------------------------------------- events

@njit
def add_event(events_i, events_f, state, kind: int, node: int, record: int, other: int,
              before: float, after: float) -> None:
    """Append an event for Python to collect after the call."""
    e = state[S_EVENTS]
    events_i[e, EV_KIND] = kind
    events_i[e, EV_NODE] = node
    events_i[e, EV_RECORD] = record
    events_i[e, EV_OTHER] = other
    events_f[e, EV_BEFORE] = before
    events_f[e, EV_AFTER] = after
    state[S_EVENTS] = e + 1
