"""The classifier's state as a few typed tables, and how they are allocated and grown.

This is the one written-down interface of the compiled core. All state lives in the
:class:`ClassifierTables` named tuple; kernels update it in place and never allocate
state. When a table is full a kernel returns to Python, which enlarges it (:func:`grow`)
and calls the kernel again from the same record, so results never depend on capacities
or batch sizes. Columns of one concept share a table: a record touches few arrays, which
keeps the compiled loop free of per-array bookkeeping.

Nodes (capacity N; ids 0..n_nodes-1; the root is 0)
    node_i  int64[N, 8]  columns KIND (0 leaf, 1 numeric ``x <= threshold`` -> child 0,
                         2 category multiway -> child_table[start + code], 3 category
                         ``x == code`` -> child 0), FEATURE (-1 at leaves), CHILD_START,
                         N_CHILDREN, PARENT, DEPTH, CREATED (records learned at creation),
                         SLOT (row of leaf statistics, -1 when inactive or a branch)
    node_f  f8[N, 8]     THRESHOLD (or the category code of kind 3), WEIGHT (weight that
                         reached the node; missing values follow the heaviest child),
                         LAST_ATTEMPT (leaf weight at the last split attempt), MC_CORRECT,
                         NB_CORRECT (records the majority / naive Bayes model got right),
                         MERIT (of the chosen split), SCORED and HITS (records the leaf
                         scored, and scored right, since it was created)
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

Other
    state   int64[16]  counters, indices S_* below
    cfg_i, cfg_f       settings, indices C_* and F_* below
    fmap    int64[F, 3]  per feature: FM_KIND (0 numeric, 1 category), FM_LOCAL (index
                         among features of that kind), FM_SEEN (1 + highest code learned)
"""

from __future__ import annotations

import collections

import numpy as np

from .settings import CRITERIA, LEAF_MODELS, NUMERIC_OBSERVERS, TreeSettings

# node_i columns
KIND, FEATURE, CHILD_START, N_CHILDREN, PARENT, DEPTH, CREATED, SLOT = range(8)
NODE_I_COLS = 8
# node_f columns
THRESHOLD, WEIGHT, LAST_ATTEMPT, MC_CORRECT, NB_CORRECT, MERIT, SCORED, HITS = range(8)
NODE_F_COLS = 8
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
S_LEAVES = 10        # leaves, active or not
STATE_SIZE = 16

# cfg_i indices
C_CRITERION, C_GRACE, C_LEAF_MODEL, C_OBSERVER, C_CANDIDATES, C_BINS, C_PREPRUNE, \
    C_BINARY_CATS, C_MAX_DEPTH, C_NB_AFTER, C_BUFFER = range(11)
CFG_I_SIZE = 12
# cfg_f indices
F_DELTA, F_TAU, F_MIN_BRANCH, F_MAX_SHARE, F_MEMORY_BYTES = range(5)
CFG_F_SIZE = 8

FIELDS = ("node_i", "node_f", "counts", "child_table", "gauss", "cats", "hist_edges",
          "hist_counts", "hist_buf", "hist_meta", "free_slots", "state", "cfg_i", "cfg_f",
          "fmap")
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
    arrays = {name: np.zeros(shape, np.int64 if name == "hist_meta" else np.float64)
              for name, shape in shapes.items()}
    arrays.update(
        node_i=np.zeros((nodes, NODE_I_COLS), np.int64),
        node_f=np.zeros((nodes, NODE_F_COLS), np.float64),
        counts=np.zeros((nodes, classes), np.float64),
        child_table=np.full(max(4 * nodes, 16), -1, np.int64),
        free_slots=np.arange(slots - 1, -1, -1, dtype=np.int64),
        state=np.zeros(STATE_SIZE, np.int64), cfg_i=cfg_i, cfg_f=cfg_f, fmap=fmap)
    t = ClassifierTables(**arrays)
    t.state[S_FREE_TOP] = slots
    t.state[S_NODES] = 1
    t.state[S_LEAVES] = 1
    t.node_i[0, FEATURE] = -1
    t.node_i[0, PARENT] = -1
    t.state[S_FREE_TOP] = slots - 1
    t.state[S_ACTIVE] = 1
    t.node_i[0, SLOT] = t.free_slots[slots - 1]
    return t


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


def grow(t: ClassifierTables, nodes: int = 0, slots: int = 0, classes: int = 0,
         cats: int = 0, children: int = 0) -> ClassifierTables:
    """Return tables with at least the given capacities (0 = keep), contents preserved.

    Growing the category capacity also re-lays the child table: every multiway branch
    owns a block with one entry per possible category code.
    """
    cap = capacities(t)
    asked = {"nodes": nodes, "slots": slots, "classes": classes, "cats": cats,
             "children": children}
    new = {k: max(v, asked[k]) for k, v in cap.items()}
    arrays = t._asdict()
    arrays["state"] = t.state.copy()
    if new["nodes"] != cap["nodes"]:
        arrays["node_i"] = _resized(t.node_i, (new["nodes"], NODE_I_COLS))
        arrays["node_f"] = _resized(t.node_f, (new["nodes"], NODE_F_COLS))
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
        # new slots go under the free stack, so the order of reuse stays the same
        top = int(t.state[S_FREE_TOP])
        extra = np.arange(new["slots"] - 1, cap["slots"] - 1, -1, dtype=np.int64)
        free = np.empty(new["slots"], np.int64)
        free[:len(extra)] = extra
        free[len(extra):len(extra) + top] = t.free_slots[:top]
        arrays["free_slots"] = free
        arrays["state"][S_FREE_TOP] = top + len(extra)
    if new["cats"] != cap["cats"]:
        arrays["child_table"], arrays["node_i"], used = _relay_children(
            arrays["child_table"], arrays["node_i"], int(t.state[S_NODES]), new["cats"],
            new["children"])
        arrays["state"][S_CHILD_USED] = used
    elif new["children"] != cap["children"]:
        arrays["child_table"] = _resized(t.child_table, (new["children"],), -1)
    return ClassifierTables(**arrays)


def _relay_children(table: np.ndarray, node_i: np.ndarray, n_nodes: int, cats: int,
                    capacity: int):
    node_i = node_i.copy()
    kinds = node_i[:n_nodes, KIND]
    need = int(np.where(kinds == MULTIWAY, cats, np.where(kinds == LEAF, 0, 2)).sum())
    out = np.full(max(capacity, 2 * need + 16), -1, np.int64)
    used = 0
    for n in range(n_nodes):
        kind = node_i[n, KIND]
        if kind == LEAF:
            continue
        width = cats if kind == MULTIWAY else 2
        start, count = node_i[n, CHILD_START], node_i[n, N_CHILDREN]
        out[used:used + count] = table[start:start + count]
        node_i[n, CHILD_START] = used
        node_i[n, N_CHILDREN] = width
        used += width
    return out, node_i, used
