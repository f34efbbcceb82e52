"""The classifier's state as a few typed tables, and how they are allocated and grown.

This is the one written-down interface of the compiled core. All state lives in the
:class:`ClassifierTables` named tuple; kernels update it in place and never allocate
state. When a table is full a kernel returns to Python, which enlarges it (:func:`grow`)
and calls the kernel again from the same record, so results never depend on capacities
or batch sizes. Columns of one concept share a table: a record touches few arrays, which
keeps the compiled loop free of per-array bookkeeping. The node columns, counters, events
and ``fmap`` the regressor shares are defined in :mod:`stream.tree.layout`.

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
                                 rows unless the histogram split statistic is chosen)

Drift (one detector row per live node; see :mod:`stream.tree.drift`)
    adwin_buckets, adwin_counts, adwin_state   ADWIN tables (zero rows unless chosen)
    ph_state                                   Page-Hinkley table (zero rows unless chosen)
    free_dets   int64[D]   stack of free detector rows
    free_nodes  int64[N]   stack of recycled node ids
    events_i    int64[E, 4]  EV_KIND (EV_ALARM, EV_START, EV_SWAP, EV_DROP), EV_NODE,
                             EV_RECORD, EV_OTHER (the alternate root for start/swap/drop)
    events_f    f8[E, 2]     EV_BEFORE, EV_AFTER: error rates (alarm: before and after the
                             detector cut its window; swap/drop: main and alternate)

Other
    state   int64[32]  counters, indices S_* (:mod:`stream.tree.layout`; S_CLASSES_SEEN
                       and S_PRUNED below)
    cfg_i, cfg_f       settings, indices C_* and F_* below
    fmap    int64[F, 3]  per feature: FM_KIND (0 numeric, 1 category), FM_LOCAL (index
                         among features of that kind), FM_SEEN (1 + highest code learned)
"""

from __future__ import annotations

import collections

import numpy as np

from stream.tree.layout import (ALT, ALT_OF, ALTERNATE, BRANCH, CHILD_START, CREATED, DEAD,  # noqa: F401 (the shared layout, re-exported)
                                DEPTH, DET, EQUALS, EV_AFTER, EV_ALARM, EV_BEFORE, EV_DROP,
                                EV_KIND, EV_NODE, EV_OTHER, EV_RECORD, EV_START, EV_SWAP,
                                EVENT_NAMES, FEATURE, FM_KIND, FM_LOCAL, FM_SEEN, FREE,
                                KIND, LEAF, MAIN, MULTIWAY, N_CHILDREN, NODE_I_COLS,
                                NUMERIC, PARENT, S_ACTIVE, S_ALARMS, S_ALTS, S_CATS_SEEN,
                                S_CHILD_USED, S_CREATED, S_DEACTIVATED, S_DEAD, S_DROPS,
                                S_EVENTS, S_FREE_DETS, S_FREE_NODES, S_FREE_TOP, S_LEARNED,
                                S_LEAVES, S_MAX_DEPTH, S_NODES, S_ROOT, S_SPLITS, S_STARTS,
                                S_SWAPS, S_WANTS_SLOTS, SLOT, STATE_SIZE, STATUS, SWAPPED, detector_shapes,
                                event_capacity, feature_map, grow_node_rows,
                                grow_slot_stack, node_arrays, plant_root, relay_children,
                                resized)
from stream.errors import ModelFileError
from stream.tree.checked import check_like, check_structure
from stream.tree.settings import DETECTORS

from .settings import CRITERIA, LEAF_MODELS, NUMERIC_SPLITS, TreeSettings

# node_f columns
THRESHOLD, WEIGHT, LAST_ATTEMPT, MC_CORRECT, NB_CORRECT, MERIT, SCORED, HITS, ERR_SUM, \
    ERR_N = range(10)
NODE_F_COLS = 10
# gauss last axis
G_N, G_MEAN, G_M2, G_MIN, G_MAX, G_LLA, G_LLB = range(7)
GAUSS_COLS = 7
# hist_meta last axis
H_READY, H_NEDGES, H_NBUF = range(3)

# state indices of the classifier's own (the others: stream.tree.layout)
S_CLASSES_SEEN = 5   # 1 + highest class code learned so far
S_PRUNED = 8         # split attempts where "no split" won

# cfg_i indices
C_CRITERION, C_GRACE, C_LEAF_MODEL, C_SPLITS, C_CANDIDATES, C_BINS, C_PREPRUNE, \
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
    cfg_i[C_SPLITS] = NUMERIC_SPLITS[settings.numeric_splits]
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


def allocate(settings: TreeSettings, feature_kinds: list[str], classes: int = 2,
             cats: int = 4, nodes: int = 64, slots: int = 32) -> ClassifierTables:
    """Empty tables holding a single active root leaf (node 0)."""
    fmap, n_numeric, n_cat = feature_map(feature_kinds)
    cfg_i, cfg_f = config_arrays(settings)
    shapes = _slot_shapes(slots, n_numeric, n_cat, classes, cats,
                          settings.numeric_splits == "histogram", settings.histogram_bins,
                          int(cfg_i[C_BUFFER]))
    shapes.update(detector_shapes(int(cfg_i[C_DETECTOR]), nodes, int(cfg_i[C_ADWIN_BUCKETS])))
    integer = ("hist_meta", "adwin_counts")
    arrays = {name: np.zeros(shape, np.int64 if name in integer else np.float64)
              for name, shape in shapes.items()}
    arrays.update(node_arrays(nodes, NODE_F_COLS))
    arrays.update(counts=np.zeros((nodes, classes), np.float64),
                  free_slots=np.arange(slots - 1, -1, -1, dtype=np.int64),
                  cfg_i=cfg_i, cfg_f=cfg_f, fmap=fmap)
    t = ClassifierTables(**arrays)
    plant_root(t, with_detector=t.cfg_i[C_DETECTOR] != DETECTORS["off"])
    return t


def check_tables(t: ClassifierTables, settings: TreeSettings,
                 feature_kinds: list[str]) -> ClassifierTables:
    """``t`` if its tables fit together, fit ``settings`` and ``feature_kinds`` and make
    a tree (:func:`stream.tree.checked.check_structure`); otherwise
    :class:`~stream.errors.ModelFileError` naming the first field that does not. The
    kernels index without bounds checks, so a damaged or edited file is refused here."""
    fresh = allocate(settings, feature_kinds, classes=1, cats=1, nodes=1, slots=1)
    check_like(t, fresh, FIELDS)
    nodes, slots = t.node_i.shape[0], t.free_slots.shape[0]
    classes, cats = t.counts.shape[1], t.cats.shape[3] - 1
    if nodes < 1 or classes < 1 or cats < 0 or t.child_table.shape[0] < 0:
        raise ModelFileError("saved tree: its tables are empty")
    histogram = settings.numeric_splits == "histogram"
    buffer = int(fresh.cfg_i[C_BUFFER])
    n_numeric, n_cat = t.gauss.shape[1], t.cats.shape[1]
    expected = _slot_shapes(slots, n_numeric, n_cat, classes, cats, histogram,
                            settings.histogram_bins, buffer)
    expected.update(detector_shapes(int(fresh.cfg_i[C_DETECTOR]), nodes,
                                    int(fresh.cfg_i[C_ADWIN_BUCKETS])))
    expected.update({"node_i": (nodes, NODE_I_COLS), "node_f": (nodes, NODE_F_COLS),
                     "counts": (nodes, classes), "free_slots": (slots,),
                     "free_dets": (nodes,), "free_nodes": (nodes,),
                     "events_i": (event_capacity(nodes), 4),
                     "events_f": (event_capacity(nodes), 2)})
    if (n_numeric, n_cat) != (fresh.gauss.shape[1], fresh.cats.shape[1]):
        raise ModelFileError("saved tree: its tables were built for other features")
    for name, shape in expected.items():
        if getattr(t, name).shape != shape:
            raise ModelFileError(f"saved tree: table {name!r} has shape "
                                 f"{getattr(t, name).shape}, expected {shape}")
    seen = t.fmap[:, FM_SEEN]
    if ((seen < 0) | (seen > cats)).any():
        raise ModelFileError("saved tree: the feature map's category counts exceed the "
                             "category tables")
    if not (0 <= t.state[S_CLASSES_SEEN] <= classes and 0 <= t.state[S_CATS_SEEN] <= cats + 1):
        raise ModelFileError("saved tree: its class or category counters exceed its tables")
    if histogram and t.hist_meta.size and (
            (t.hist_meta < 0).any() or (t.hist_meta[..., H_NEDGES] > settings.histogram_bins - 1).any()
            or (t.hist_meta[..., H_NBUF] > buffer).any()):
        raise ModelFileError("saved tree: its histogram counters exceed their tables")
    check_structure(t, len(feature_kinds), int(fresh.cfg_i[C_DETECTOR]) != DETECTORS["off"])
    return ClassifierTables(**{f: np.ascontiguousarray(getattr(t, f)) for f in FIELDS})


def capacities(t: ClassifierTables) -> dict:
    """Current capacities: nodes, slots, classes, category codes, child-table entries."""
    return {"nodes": t.node_i.shape[0], "slots": t.free_slots.shape[0],
            "classes": t.counts.shape[1], "cats": t.cats.shape[3] - 1,
            "children": t.child_table.shape[0]}


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
        grow_node_rows(arrays, t, new["nodes"], int(t.cfg_i[C_DETECTOR]),
                       int(t.cfg_i[C_ADWIN_BUCKETS]))
    if new["nodes"] != cap["nodes"] or new["classes"] != cap["classes"]:
        arrays["counts"] = resized(t.counts, (new["nodes"], new["classes"]))
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
            arrays[name] = resized(arrays[name], tuple(shape))
    if new["slots"] != cap["slots"]:
        grow_slot_stack(arrays, t, new["slots"])
    if new["cats"] != cap["cats"] or new["children"] != cap["children"]:
        arrays["child_table"], arrays["node_i"], state[S_CHILD_USED] = relay_children(
            arrays["child_table"], arrays["node_i"], int(t.state[S_NODES]), new["cats"],
            new["children"])
    return ClassifierTables(**arrays)

