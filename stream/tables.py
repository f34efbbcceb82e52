"""The classifier's state as a few typed tables, and how they are allocated and grown.

This is the one written-down interface of the compiled core. All state lives in the
:class:`ClassifierTables` named tuple; kernels update it in place and never allocate
state. When a table is full a kernel returns to Python, which enlarges it (:func:`grow`)
and calls the kernel again from the same record, so results never depend on capacities
or batch sizes. Columns of one concept share a table: a record touches few arrays, which
keeps the compiled loop free of per-array bookkeeping.

Nodes (capacity N; ids 0..n_nodes-1; the root is 0)
    node_i  int64[N, 14] columns KIND (0 leaf, 1 numeric ``x <= threshold`` -> child 0,
                         2 category multiway -> child_table[start + code], 3 category
                         ``x == code`` -> child 0), FEATURE (-1 at leaves), CHILD_START,
                         N_CHILDREN, PARENT, DEPTH, CREATED (records learned at creation),
                         SLOT (row of leaf statistics, -1 when inactive or a branch),
                         BRANCH (position in the parent's child block; an alternate root
                         takes the position of the node it may replace), ALT (root of the
                         alternate subtree growing beside this node, -1 none), STATUS
                         (MAIN, ALTERNATE: inside an alternate subtree, DEAD: replaced or
                         dropped, FREE: recycled), DET (detector row, -1 none), SWAPPED
                         (records learned when this subtree replaced another, -1 never),
                         ALT_OF (for an alternate root: the node it grows beside, else -1)
    node_f  f8[N, 10]    THRESHOLD (or the category code of kind 3), WEIGHT (weight that
                         reached the node; missing values follow the heaviest child),
                         LAST_ATTEMPT (leaf weight at the last split attempt), MC_CORRECT,
                         NB_CORRECT (records the majority / naive Bayes model got right),
                         MERIT (of the chosen split), SCORED and HITS (records the leaf
                         scored, and scored right, since it was created), ERR_SUM and
                         ERR_N (errors and records since the node's error estimate was
                         last reset: the estimate the swap test compares)
    counts  f8[N, C]     class weights: live at leaves, as at the split for branches
    child_table int64[M] child ids per branch block (-1: no branch for that code yet)

Leaf statistics (capacity S slots; only active leaves hold one)
    gauss   f8[S, Fn, C, 7]  per numeric feature and class: G_N, G_MEAN, G_M2 (Welford),
                             G_MIN, G_MAX, and G_LLA, G_LLB with
                             log N(x) = (x - mean)^2 * lla + llb (llb = -inf: undefined)
    cats    f8[S, Fc, C, K+1]  per categorical feature and class: [0] total, [1 + code] weight
    hist_edges  f8[S, Fn, B-1]   bin edges, quantiles of the first values the leaf saw
    hist_counts f8[S, Fn, B, C]  class weights per bin
    hist_buf    f8[S, Fn, W, 2]  (value, class) buffered until the edges are set
    hist_meta   int64[S, Fn, 3]  H_READY (edges set), H_NEDGES (edges in use), H_NBUF
                                 (values buffered); all zero for a fresh slot
    free_slots  int64[S]         stack of free slot ids (the histogram tables have S = 0
                                 rows unless the histogram observer is chosen)

Drift (one detector row per live node; see :mod:`stream.drift`)
    adwin_buckets, adwin_counts, adwin_state   ADWIN tables (zero rows unless chosen)
    ph_state                                   Page-Hinkley table (zero rows unless chosen)
    free_dets   int64[D]   stack of free detector rows
    free_nodes  int64[N]   stack of recycled node ids
    events_i    int64[E, 4]  EV_KIND (EV_ALARM, EV_START, EV_SWAP, EV_DROP), EV_NODE,
                             EV_RECORD, EV_OTHER (the alternate root for start/swap/drop)
    events_f    f8[E, 2]     EV_BEFORE, EV_AFTER: error rates (alarm: before and after the
                             detector cut its window; swap/drop: main and alternate)

Other
    state   int64[32]  counters, indices S_* below
    cfg_i, cfg_f       settings, indices C_* and F_* below
    fmap    int64[F, 3]  per feature: FM_KIND (0 numeric, 1 category), FM_LOCAL (index
                         among features of that kind), FM_SEEN (1 + highest code learned)
"""

from __future__ import annotations

import collections

import numpy as np

from .drift import (ADWIN, ADWIN_COLS, ADWIN_LEVELS, PAGE_HINKLEY, PH_COLS, adwin_reset,
                    page_hinkley_reset)
from .settings import CRITERIA, DETECTORS, LEAF_MODELS, NUMERIC_OBSERVERS, TreeSettings

# node_i columns
KIND, FEATURE, CHILD_START, N_CHILDREN, PARENT, DEPTH, CREATED, SLOT, BRANCH, ALT, STATUS, \
    DET, SWAPPED, ALT_OF = range(14)
NODE_I_COLS = 14
# node status
MAIN, ALTERNATE, DEAD, FREE = 0, 1, 2, 3
# events
EV_KIND, EV_NODE, EV_RECORD, EV_OTHER = range(4)
EV_BEFORE, EV_AFTER = range(2)
EV_ALARM, EV_START, EV_SWAP, EV_DROP = 1, 2, 3, 4
EVENT_NAMES = {EV_ALARM: "alarm", EV_START: "start", EV_SWAP: "swap", EV_DROP: "drop"}
# node_f columns
THRESHOLD, WEIGHT, LAST_ATTEMPT, MC_CORRECT, NB_CORRECT, MERIT, SCORED, HITS, ERR_SUM, \
    ERR_N = range(10)
NODE_F_COLS = 10
# gauss last axis
G_N, G_MEAN, G_M2, G_MIN, G_MAX, G_LLA, G_LLB = range(7)
GAUSS_COLS = 7
# hist_meta last axis
H_READY, H_NEDGES, H_NBUF = range(3)
# fmap columns
FM_KIND, FM_LOCAL, FM_SEEN = range(3)

# node kinds
LEAF, NUMERIC, MULTIWAY, EQUALS = 0, 1, 2, 3

# state indices
S_NODES = 0          # nodes in use
S_FREE_TOP = 1       # free slots on the stack
S_CHILD_USED = 2     # entries of child_table in use
S_ACTIVE = 3         # active leaves
S_LEARNED = 4        # records learned
S_CLASSES_SEEN = 5   # 1 + highest class code learned so far
S_CATS_SEEN = 6      # 1 + highest category code learned so far (any categorical feature)
S_SPLITS = 7         # splits made
S_PRUNED = 8         # split attempts where "no split" won
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
STATE_SIZE = 32

# cfg_i indices
C_CRITERION, C_GRACE, C_LEAF_MODEL, C_OBSERVER, C_CANDIDATES, C_BINS, C_PREPRUNE, \
    C_BINARY_CATS, C_MAX_DEPTH, C_NB_AFTER, C_BUFFER, C_DETECTOR, C_ADWIN_CLOCK, \
    C_ADWIN_BUCKETS, C_ADWIN_MIN_LEN, C_ADWIN_GRACE, C_PH_MIN, C_PH_MODE, C_SWAP_AFTER \
    = range(19)
CFG_I_SIZE = 20
# cfg_f indices
F_DELTA, F_TAU, F_MIN_BRANCH, F_MAX_SHARE, F_MEMORY_BYTES, F_ADWIN_DELTA, F_PH_DELTA, \
    F_PH_THRESHOLD, F_PH_ALPHA, F_SWAP_SIGNIFICANCE = range(10)
CFG_F_SIZE = 12

FIELDS = ("node_i", "node_f", "counts", "child_table", "gauss", "cats", "hist_edges",
          "hist_counts", "hist_buf", "hist_meta", "free_slots", "state", "cfg_i", "cfg_f",
          "fmap", "adwin_buckets", "adwin_counts", "adwin_state", "ph_state", "free_dets",
          "free_nodes", "events_i", "events_f")
SLOT_TABLES = ("gauss", "cats", "hist_edges", "hist_counts", "hist_buf", "hist_meta")

ClassifierTables = collections.namedtuple("ClassifierTables", FIELDS)


def config_arrays(settings: TreeSettings) -> tuple[np.ndarray, np.ndarray]:
    """Encode settings into the kernels' integer and float configuration vectors."""
    cfg_i = np.zeros(CFG_I_SIZE, np.int64)
    cfg_f = np.zeros(CFG_F_SIZE, np.float64)
    cfg_i[C_CRITERION] = CRITERIA[settings.criterion]
    cfg_i[C_GRACE] = settings.grace_period
    cfg_i[C_LEAF_MODEL] = LEAF_MODELS[settings.leaf_model]
    cfg_i[C_OBSERVER] = NUMERIC_OBSERVERS[settings.numeric_observer]
    cfg_i[C_CANDIDATES] = settings.candidate_thresholds
    cfg_i[C_BINS] = settings.histogram_bins
    cfg_i[C_PREPRUNE] = int(settings.prepruning)
    cfg_i[C_BINARY_CATS] = int(settings.binary_categories)
    cfg_i[C_MAX_DEPTH] = settings.max_depth if settings.max_depth is not None else 1 << 30
    cfg_i[C_NB_AFTER] = settings.naive_bayes_after
    cfg_i[C_BUFFER] = 4 * settings.histogram_bins
    cfg_f[F_DELTA] = settings.delta
    cfg_f[F_TAU] = settings.tie_threshold
    cfg_f[F_MIN_BRANCH] = settings.min_branch_fraction
    cfg_f[F_MAX_SHARE] = settings.max_share_to_split
    cfg_f[F_MEMORY_BYTES] = settings.memory_mb * 2.0 ** 20
    cfg_i[C_DETECTOR] = DETECTORS[settings.detector]
    cfg_i[C_ADWIN_CLOCK] = 32           # river.drift.ADWIN defaults (Bifet & Gavalda 2007)
    cfg_i[C_ADWIN_BUCKETS] = 5
    cfg_i[C_ADWIN_MIN_LEN] = 5
    cfg_i[C_ADWIN_GRACE] = 10
    cfg_f[F_ADWIN_DELTA] = settings.adwin_delta
    cfg_i[C_PH_MIN] = 30                # river.drift.PageHinkley defaults
    cfg_i[C_PH_MODE] = 0
    cfg_f[F_PH_DELTA] = 0.005
    cfg_f[F_PH_THRESHOLD] = settings.page_hinkley_threshold
    cfg_f[F_PH_ALPHA] = 1.0 - 0.0001
    cfg_i[C_SWAP_AFTER] = settings.swap_after
    cfg_f[F_SWAP_SIGNIFICANCE] = settings.swap_significance
    return cfg_i, cfg_f


def _slot_shapes(slots: int, n_numeric: int, n_cat: int, classes: int, cats: int,
                 histogram: bool, bins: int, buffer: int) -> dict:
    hs = slots if histogram else 0
    return {"gauss": (slots, n_numeric, classes, GAUSS_COLS),
            "cats": (slots, n_cat, classes, cats + 1),
            "hist_edges": (hs, n_numeric, bins - 1),
            "hist_counts": (hs, n_numeric, bins, classes),
            "hist_buf": (hs, n_numeric, buffer, 2),
            "hist_meta": (hs, n_numeric, 3)}


def _detector_shapes(detector: int, rows: int, buckets: int) -> dict:
    adwin = rows if detector == ADWIN else 0
    ph = rows if detector == PAGE_HINKLEY else 0
    return {"adwin_buckets": (adwin, ADWIN_LEVELS, buckets + 1, 2),
            "adwin_counts": (adwin, ADWIN_LEVELS), "adwin_state": (adwin, ADWIN_COLS),
            "ph_state": (ph, PH_COLS)}


def allocate(settings: TreeSettings, feature_kinds: list[str], classes: int = 2,
             cats: int = 4, nodes: int = 64, slots: int = 32) -> ClassifierTables:
    """Empty tables holding a single active root leaf (node 0)."""
    fmap = np.zeros((len(feature_kinds), 3), np.int64)
    counters = [0, 0]
    for f, name in enumerate(feature_kinds):
        kind = 0 if name == "numeric" else 1
        fmap[f, FM_KIND] = kind
        fmap[f, FM_LOCAL] = counters[kind]
        counters[kind] += 1
    cfg_i, cfg_f = config_arrays(settings)
    shapes = _slot_shapes(slots, counters[0], counters[1], classes, cats,
                          settings.numeric_observer == "histogram", settings.histogram_bins,
                          int(cfg_i[C_BUFFER]))
    shapes.update(_detector_shapes(int(cfg_i[C_DETECTOR]), nodes, int(cfg_i[C_ADWIN_BUCKETS])))
    integer = ("hist_meta", "adwin_counts")
    arrays = {name: np.zeros(shape, np.int64 if name in integer else np.float64)
              for name, shape in shapes.items()}
    arrays.update(
        node_i=np.zeros((nodes, NODE_I_COLS), np.int64),
        node_f=np.zeros((nodes, NODE_F_COLS), np.float64),
        counts=np.zeros((nodes, classes), np.float64),
        child_table=np.full(max(4 * nodes, 16), -1, np.int64),
        free_slots=np.arange(slots - 1, -1, -1, dtype=np.int64),
        free_dets=np.arange(nodes - 1, -1, -1, dtype=np.int64),
        free_nodes=np.zeros(nodes, np.int64),
        events_i=np.zeros((_event_capacity(nodes), 4), np.int64),
        events_f=np.zeros((_event_capacity(nodes), 2), np.float64),
        state=np.zeros(STATE_SIZE, np.int64), cfg_i=cfg_i, cfg_f=cfg_f, fmap=fmap)
    t = ClassifierTables(**arrays)
    t.state[S_NODES] = 1
    t.state[S_LEAVES] = 1
    t.state[S_ROOT] = 0
    t.state[S_FREE_DETS] = nodes
    t.node_i[0, FEATURE] = -1
    t.node_i[0, PARENT] = -1
    t.node_i[0, ALT] = -1
    t.node_i[0, SWAPPED] = -1
    t.node_i[0, DET] = -1
    t.node_i[0, ALT_OF] = -1
    if t.cfg_i[C_DETECTOR] != DETECTORS["off"]:
        t.state[S_FREE_DETS] = nodes - 1
        t.node_i[0, DET] = t.free_dets[nodes - 1]
        if t.adwin_state.shape[0]:
            adwin_reset(t.adwin_buckets, t.adwin_counts, t.adwin_state, t.node_i[0, DET])
        if t.ph_state.shape[0]:
            page_hinkley_reset(t.ph_state, t.node_i[0, DET])
    t.state[S_FREE_TOP] = slots - 1
    t.state[S_ACTIVE] = 1
    t.node_i[0, SLOT] = t.free_slots[slots - 1]
    return t


def _event_capacity(nodes: int) -> int:
    return 4 * nodes + 64


def capacities(t: ClassifierTables) -> dict:
    """Current capacities: nodes, slots, classes, category codes, child-table entries."""
    return {"nodes": t.node_i.shape[0], "slots": t.free_slots.shape[0],
            "classes": t.counts.shape[1], "cats": t.cats.shape[3] - 1,
            "children": t.child_table.shape[0]}


def _resized(arr: np.ndarray, shape: tuple, fill=0) -> np.ndarray:
    out = np.full(shape, fill, arr.dtype)
    common = tuple(slice(0, min(a, b)) for a, b in zip(arr.shape, shape))
    out[common] = arr[common]
    return out


def _grown_stack(stack: np.ndarray, top: int, old: int, new: int) -> np.ndarray:
    """A free-id stack of capacity ``new``: the new ids go under the existing ones, so
    the order in which ids are reused stays the same."""
    extra = np.arange(new - 1, old - 1, -1, dtype=np.int64)
    out = np.empty(new, np.int64)
    out[:len(extra)] = extra
    out[len(extra):len(extra) + top] = stack[:top]
    return out


def grow(t: ClassifierTables, nodes: int = 0, slots: int = 0, classes: int = 0,
         cats: int = 0, children: int = 0) -> ClassifierTables:
    """Return tables with at least the given capacities (0 = keep), contents preserved.

    Node capacity carries the detector rows and the event buffer with it. Growing the
    category capacity also re-lays the child table: every multiway branch owns a block
    with one entry per possible category code.
    """
    cap = capacities(t)
    asked = {"nodes": nodes, "slots": slots, "classes": classes, "cats": cats,
             "children": children}
    new = {k: max(v, asked[k]) for k, v in cap.items()}
    arrays = t._asdict()
    arrays["state"] = t.state.copy()
    state = arrays["state"]
    if new["nodes"] != cap["nodes"]:
        arrays["node_i"] = _resized(t.node_i, (new["nodes"], NODE_I_COLS))
        arrays["node_f"] = _resized(t.node_f, (new["nodes"], NODE_F_COLS))
        arrays["free_nodes"] = _resized(t.free_nodes, (new["nodes"],))
        for name, shape in _detector_shapes(int(t.cfg_i[C_DETECTOR]), new["nodes"],
                                            int(t.cfg_i[C_ADWIN_BUCKETS])).items():
            arrays[name] = _resized(arrays[name], shape)
        arrays["free_dets"] = _grown_stack(t.free_dets, int(t.state[S_FREE_DETS]),
                                           cap["nodes"], new["nodes"])
        state[S_FREE_DETS] += new["nodes"] - cap["nodes"]
        events = _event_capacity(new["nodes"])
        arrays["events_i"] = _resized(t.events_i, (events, 4))
        arrays["events_f"] = _resized(t.events_f, (events, 2))
    if new["nodes"] != cap["nodes"] or new["classes"] != cap["classes"]:
        arrays["counts"] = _resized(t.counts, (new["nodes"], new["classes"]))
    if new["slots"] != cap["slots"] or new["classes"] != cap["classes"] \
            or new["cats"] != cap["cats"]:
        for name in SLOT_TABLES:
            shape = list(arrays[name].shape)
            if shape[0]:
                shape[0] = new["slots"]
            if name in ("gauss", "cats"):
                shape[2] = new["classes"]
            if name == "hist_counts":
                shape[3] = new["classes"]
            if name == "cats":
                shape[3] = new["cats"] + 1
            arrays[name] = _resized(arrays[name], tuple(shape))
    if new["slots"] != cap["slots"]:
        arrays["free_slots"] = _grown_stack(t.free_slots, int(t.state[S_FREE_TOP]),
                                            cap["slots"], new["slots"])
        state[S_FREE_TOP] += new["slots"] - cap["slots"]
    if new["cats"] != cap["cats"] or new["children"] != cap["children"]:
        arrays["child_table"], arrays["node_i"], state[S_CHILD_USED] = _relay_children(
            arrays["child_table"], arrays["node_i"], int(t.state[S_NODES]), new["cats"],
            new["children"])
    return ClassifierTables(**arrays)


def _relay_children(table: np.ndarray, node_i: np.ndarray, n_nodes: int, cats: int,
                    capacity: int):
    """A fresh child table holding the blocks of live branches only (dead and recycled
    nodes' blocks are dropped), multiway blocks widened to ``cats`` entries."""
    node_i = node_i.copy()
    live = (node_i[:n_nodes, KIND] != LEAF) & (node_i[:n_nodes, STATUS] < DEAD)
    kinds = node_i[:n_nodes, KIND]
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
