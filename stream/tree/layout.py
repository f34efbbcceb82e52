"""The node layout both trees share: column and counter positions, and the Python code
that allocates and grows the node, detector and event tables.

The classifier (:mod:`stream.classify.tables`) and the regressor (:mod:`stream.regress.tables`)
keep their trees in tables of the same shape: ``node_i`` (the integer columns below, all
of them shared), ``node_f`` (THRESHOLD and WEIGHT first, then each tree's own statistics),
``child_table``, one detector row per live node, stacks of free node ids and detector
rows, an event buffer, ``state`` counters and ``fmap``. What is defined here has one
meaning in both, so routing, the life of alternate subtrees (:mod:`stream.tree.kernel`)
and the views of the main tree (:mod:`stream.tree.views`) are written once. Each tables
module re-exports these names beside its own.
"""

from __future__ import annotations

import numpy as np

from .drift import (ADWIN, ADWIN_COLS, ADWIN_LEVELS, PAGE_HINKLEY, PH_COLS, adwin_reset,
                    page_hinkley_reset)

# node_i columns
KIND, FEATURE, CHILD_START, N_CHILDREN, PARENT, DEPTH, CREATED, SLOT, BRANCH, ALT, STATUS, \
    DET, SWAPPED, ALT_OF = range(14)
NODE_I_COLS = 14
# node_f columns every tree starts with
THRESHOLD, WEIGHT = 0, 1
# node kinds
LEAF, NUMERIC, MULTIWAY, EQUALS = 0, 1, 2, 3
# node status
MAIN, ALTERNATE, DEAD, FREE = 0, 1, 2, 3
# events
EV_KIND, EV_NODE, EV_RECORD, EV_OTHER = range(4)
EV_BEFORE, EV_AFTER = range(2)
EV_ALARM, EV_START, EV_SWAP, EV_DROP = 1, 2, 3, 4
EVENT_NAMES = {EV_ALARM: "alarm", EV_START: "start", EV_SWAP: "swap", EV_DROP: "drop"}
# fmap columns
FM_KIND, FM_LOCAL, FM_SEEN = range(3)

# state indices (5 and 8 are the classifier's own: S_CLASSES_SEEN, S_PRUNED)
S_NODES = 0          # nodes in use
S_FREE_TOP = 1       # free slots on the stack
S_CHILD_USED = 2     # entries of child_table in use
S_ACTIVE = 3         # active leaves
S_LEARNED = 4        # records learned
S_CATS_SEEN = 6      # 1 + highest category code learned so far (any categorical feature)
S_SPLITS = 7         # splits made
S_DEACTIVATED = 9    # leaves deactivated for the memory budget
S_LEAVES = 10        # live leaves (main and alternate), active or not
S_ROOT = 11          # root of the main tree
S_FREE_NODES = 12    # recycled node ids on their stack
S_FREE_DETS = 13     # free detector rows on their stack
S_EVENTS = 14        # events waiting in the buffer
S_ALTS = 15          # alternate subtrees growing
S_ALARMS = 16        # detector alarms
S_STARTS = 17        # alternates started
S_SWAPS = 18         # alternates swapped in
S_DROPS = 19         # alternates dropped
S_MAX_DEPTH = 20     # deepest node ever created (a bound for path buffers)
S_DEAD = 21          # dead nodes not yet recycled
S_CREATED = 22       # nodes ever created (a change counter)
S_WANTS_SLOTS = 23   # 1: leaves wait for statistics slots (the loop returns to grow them)
STATE_SIZE = 32


def feature_map(feature_kinds: list[str]) -> tuple[np.ndarray, int, int]:
    """``fmap`` for features of the given kinds ("numeric" or "category"), and how many
    numeric and categorical features there are."""
    fmap = np.zeros((len(feature_kinds), 3), np.int64)
    counters = [0, 0]
    for f, name in enumerate(feature_kinds):
        kind = 0 if name == "numeric" else 1
        fmap[f, FM_KIND] = kind
        fmap[f, FM_LOCAL] = counters[kind]
        counters[kind] += 1
    return fmap, counters[0], counters[1]


def detector_shapes(detector: int, rows: int, buckets: int) -> dict:
    """Shapes of the detector tables for ``rows`` detectors (zero rows unless chosen)."""
    adwin = rows if detector == ADWIN else 0
    ph = rows if detector == PAGE_HINKLEY else 0
    return {"adwin_buckets": (adwin, ADWIN_LEVELS, buckets + 1, 2),
            "adwin_counts": (adwin, ADWIN_LEVELS), "adwin_state": (adwin, ADWIN_COLS),
            "ph_state": (ph, PH_COLS)}


def event_capacity(nodes: int) -> int:
    """Events the buffer holds for a node capacity: a call returns to Python before more
    can wait."""
    return 4 * nodes + 64


def node_arrays(nodes: int, node_f_cols: int) -> dict:
    """The node, child, id-stack, event and counter tables for ``nodes`` nodes, empty."""
    return {"node_i": np.zeros((nodes, NODE_I_COLS), np.int64),
            "node_f": np.zeros((nodes, node_f_cols), np.float64),
            "child_table": np.full(max(4 * nodes, 16), -1, np.int64),
            "free_dets": np.arange(nodes - 1, -1, -1, dtype=np.int64),
            "free_nodes": np.zeros(nodes, np.int64),
            "events_i": np.zeros((event_capacity(nodes), 4), np.int64),
            "events_f": np.zeros((event_capacity(nodes), 2), np.float64),
            "state": np.zeros(STATE_SIZE, np.int64)}


def plant_root(t, with_detector: bool) -> None:
    """Make node 0 of fresh tables the main tree's single, active root leaf, with a fresh
    detector when drift detection is on."""
    nodes, slots = t.node_i.shape[0], t.free_slots.shape[0]
    t.state[S_NODES] = 1
    t.state[S_LEAVES] = 1
    t.state[S_ROOT] = 0
    t.state[S_FREE_DETS] = nodes
    for column in (FEATURE, PARENT, ALT, SWAPPED, DET, ALT_OF):
        t.node_i[0, column] = -1
    if with_detector:
        t.state[S_FREE_DETS] = nodes - 1
        t.node_i[0, DET] = t.free_dets[nodes - 1]
        if t.adwin_state.shape[0]:
            adwin_reset(t.adwin_buckets, t.adwin_counts, t.adwin_state, t.node_i[0, DET])
        if t.ph_state.shape[0]:
            page_hinkley_reset(t.ph_state, t.node_i[0, DET])
    t.state[S_FREE_TOP] = slots - 1
    t.state[S_ACTIVE] = 1
    t.node_i[0, SLOT] = t.free_slots[slots - 1]


def resized(arr: np.ndarray, shape: tuple, fill=0) -> np.ndarray:
    """``arr`` copied into an array of ``shape``; new cells hold ``fill``."""
    out = np.full(shape, fill, arr.dtype)
    common = tuple(slice(0, min(a, b)) for a, b in zip(arr.shape, shape))
    out[common] = arr[common]
    return out


def grown_stack(stack: np.ndarray, top: int, old: int, new: int) -> np.ndarray:
    """A free-id stack of capacity ``new``: the new ids go under the existing ones, so
    the order in which ids are reused stays the same."""
    extra = np.arange(new - 1, old - 1, -1, dtype=np.int64)
    out = np.empty(new, np.int64)
    out[:len(extra)] = extra
    out[len(extra):len(extra) + top] = stack[:top]
    return out


def grow_node_rows(arrays: dict, t, nodes: int, detector: int, buckets: int) -> None:
    """Enlarge, in ``arrays`` (the fields of ``t``, ``state`` a copy), the node tables,
    detector rows, free-id stacks and event buffer of ``t`` to ``nodes`` nodes. Tables
    with one row per node that a tree adds (class counts, linear models) are the
    caller's."""
    old = t.node_i.shape[0]
    arrays["node_i"] = resized(t.node_i, (nodes, NODE_I_COLS))
    arrays["node_f"] = resized(t.node_f, (nodes, t.node_f.shape[1]))
    arrays["free_nodes"] = resized(t.free_nodes, (nodes,))
    for name, shape in detector_shapes(detector, nodes, buckets).items():
        arrays[name] = resized(arrays[name], shape)
    arrays["free_dets"] = grown_stack(t.free_dets, int(t.state[S_FREE_DETS]), old, nodes)
    arrays["state"][S_FREE_DETS] += nodes - old
    events = event_capacity(nodes)
    arrays["events_i"] = resized(t.events_i, (events, 4))
    arrays["events_f"] = resized(t.events_f, (events, 2))


def grow_slot_stack(arrays: dict, t, slots: int) -> None:
    """Enlarge, in ``arrays``, the stack of free statistics slots of ``t`` to ``slots``."""
    old = t.free_slots.shape[0]
    arrays["free_slots"] = grown_stack(t.free_slots, int(t.state[S_FREE_TOP]), old, slots)
    arrays["state"][S_FREE_TOP] += slots - old


def relay_children(table: np.ndarray, node_i: np.ndarray, n_nodes: int, cats: int,
                   capacity: int):
    """A fresh child table holding the blocks of live branches only (dead and recycled
    nodes' blocks are dropped), multiway blocks widened to ``cats`` entries. Returns it
    with the node table pointing into it and the entries in use."""
    node_i = node_i.copy()
    kinds = node_i[:n_nodes, KIND]
    live = (kinds != LEAF) & (node_i[:n_nodes, STATUS] < DEAD)
    need = int(np.where(live, np.where(kinds == MULTIWAY, cats, 2), 0).sum())
    out = np.full(max(capacity, 2 * need + 16), -1, np.int64)
    used = 0
    for n in np.flatnonzero(live):
        width = cats if kinds[n] == MULTIWAY else 2
        start, count = node_i[n, CHILD_START], node_i[n, N_CHILDREN]
        out[used:used + count] = table[start:start + count]
        node_i[n, CHILD_START] = used
        node_i[n, N_CHILDREN] = width
        used += width
    return out, node_i, used
