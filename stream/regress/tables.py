"""The regression tree's state as a few typed tables, and how they are allocated and grown.

The written-down interface of the regressor's compiled core, built like the classifier's
(:mod:`stream.classify.tables`): all state lives in the :class:`RegressorTables` named tuple;
kernels update it in place and never allocate state; when a table is full a kernel
returns to Python, which enlarges it (:func:`grow`) and calls again from the same record.

The node columns (all of ``node_i``; ``node_f`` columns THRESHOLD and WEIGHT), the
counters of the same names, events and ``fmap`` have the positions and meanings of the
classifier's: both come from :mod:`stream.tree.layout`, so routing, alternates and the
views of the main tree are written once for both trees.

Nodes (capacity N; ids 0..S_NODES-1, dead ids are reused; the main root is S_ROOT)
    node_i  int64[N, 14] KIND (0 leaf, 1 numeric ``x <= threshold`` -> child 0,
                         2 category multiway -> child_table[start + code], 3 category
                         ``x == code`` -> child 0), FEATURE (-1 at leaves), CHILD_START,
                         N_CHILDREN, PARENT, DEPTH, CREATED (records learned at creation),
                         SLOT (row of leaf split statistics, -1 when inactive or a branch),
                         BRANCH (position in the parent's child block; an alternate root
                         takes the position of the node it may replace), ALT (root of the
                         alternate subtree growing beside this node, -1 none), STATUS
                         (MAIN, ALTERNATE: inside an alternate subtree, DEAD: replaced or
                         dropped, FREE: recycled), DET (detector row, -1 none), SWAPPED
                         (records learned when this subtree replaced another, -1 never),
                         ALT_OF (for an alternate root: the node it grows beside, else -1)
    node_f  f8[N, 16]    THRESHOLD, WEIGHT (weight that reached the node; missing values
                         follow the heaviest child), LAST_ATTEMPT (OBSERVED at the last
                         split attempt), Y_N, Y_MEAN, Y_M2 (target count, mean and
                         Welford sum of squares: live at leaves, as at the split for
                         branches), ERR_MEAN, ERR_LINEAR (faded squared errors of the
                         mean and the linear model), MERIT (of the chosen split), SCORED,
                         ABS_ERROR, SQ_ERROR (records the leaf scored since it was
                         created, and the sum of their absolute and squared errors),
                         OBSERVED (records the leaf's split statistics hold: the n of the
                         Hoeffding bound), ERR_SUM, ERR_SQ, ERR_N (sum and sum of squares
                         of the normalised absolute errors the node's detector was fed,
                         and their count, since the node's error estimate was last reset:
                         the estimate the swap test compares)
    lin     f8[N, Fn+1]  linear model per node on standardised inputs: a weight per
                         numeric feature, then the intercept (branches keep theirs as at
                         the split; children and alternates start from it)
    lin_x   f8[N, Fn, 3] count, mean and Welford M2 of each numeric input among the
                         records the node learned since it was created: the leaf-local
                         scaling of the linear model's update steps
    child_table int64[M] child ids per branch block (-1: no branch for that code yet)

Standardisation (tree-wide, as FIMT-DD's perceptrons use)
    scale   f8[Fn+1, 5]  per numeric feature, then the target: SC_N, SC_MEAN, SC_M2
                         (Welford), SC_SD (sample standard deviation) and SC_INV (1 / SC_SD;
                         both 0 while undefined)

Leaf split statistics (capacity S slots; only active leaves hold one)
    q_edges f8[S, Fn, B-1]     bin edges, set from the first W values the leaf saw
    q_stats f8[S, Fn, B, 3]    target count, mean, Welford M2 per bin
    q_buf   f8[S, Fn, W, 2]    (value, target) buffered until the edges are set
    q_meta  int64[S, Fn, 3]    Q_READY, Q_NEDGES, Q_NBUF; all zero for a fresh slot
    c_stats f8[S, Fc, K, 3]    target count, mean, Welford M2 per category code
    free_slots int64[S]        stack of free slot ids

Drift (one detector row per live node; see :mod:`stream.tree.drift` and
:mod:`stream.regress.drift`)
    adwin_buckets, adwin_counts, adwin_state   ADWIN tables (zero rows unless chosen)
    ph_state                                   Page-Hinkley table (zero rows unless chosen)
    free_dets   int64[N]   stack of free detector rows
    free_nodes  int64[N]   stack of recycled node ids
    events_i    int64[E, 4]  EV_KIND (EV_ALARM, EV_START, EV_SWAP, EV_DROP), EV_NODE,
                             EV_RECORD, EV_OTHER (the alternate root for start/swap/drop)
    events_f    f8[E, 2]     EV_BEFORE, EV_AFTER: mean normalised absolute errors (alarm:
                             before and after the detector cut its window; swap/drop:
                             the node's and the alternate's)
    err_scale   f8[4]        ES_WEIGHT, ES_MEAN, ES_MAD_WEIGHT, ES_MAD: the target's faded
                             mean and mean absolute deviation with their faded weights,
                             the scale that normalises errors into [0, 1]

Other
    state   int64[32]  counters, indices S_* (:mod:`stream.tree.layout`, shared with the
                       classifier)
    cfg_i, cfg_f       settings, indices RC_* and RF_* below
    fmap    int64[F, 3]  per feature: FM_KIND (0 numeric, 1 category), FM_LOCAL (index
                         among features of that kind), FM_SEEN (1 + highest code learned)
"""

from __future__ import annotations

import collections

import numpy as np

from stream.errors import ModelFileError
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
from stream.tree.checked import check_like, check_structure
from stream.tree.settings import DETECTORS

from .settings import (REGRESSION_CRITERIA, REGRESSION_LEAF_MODELS, REGRESSION_SPLITS,
                       RegressionSettings)

# err_scale entries
ES_WEIGHT, ES_MEAN, ES_MAD_WEIGHT, ES_MAD = range(4)
ERR_SCALE_SIZE = 4

# node_f columns (THRESHOLD and WEIGHT as in stream.classify.tables)
THRESHOLD, WEIGHT, LAST_ATTEMPT, Y_N, Y_MEAN, Y_M2, ERR_MEAN, ERR_LINEAR, MERIT, SCORED, \
    ABS_ERROR, SQ_ERROR, OBSERVED, ERR_SUM, ERR_SQ, ERR_N = range(16)
NODE_F_COLS = 16
# scale columns
SC_N, SC_MEAN, SC_M2, SC_SD, SC_INV = range(5)
SCALE_COLS = 5
# q_meta last axis
Q_READY, Q_NEDGES, Q_NBUF = range(3)
# per-bin / per-code statistics last axis
ST_N, ST_MEAN, ST_M2 = range(3)

# cfg_i indices
RC_CRITERION, RC_GRACE, RC_LEAF_MODEL, RC_SPLITS, RC_BINS, RC_MIN_BRANCH, \
    RC_BINARY_CATS, RC_MAX_DEPTH, RC_BUFFER, RC_DETECTOR, RC_ADWIN_CLOCK, RC_ADWIN_BUCKETS, \
    RC_ADWIN_MIN_LEN, RC_ADWIN_GRACE, RC_PH_MIN, RC_PH_MODE, RC_SWAP_AFTER = range(17)
CFG_I_SIZE = 20
# cfg_f indices
RF_DELTA, RF_TAU, RF_MEMORY_BYTES, RF_RATE, RF_DECAY, RF_ADWIN_DELTA, RF_PH_DELTA, \
    RF_PH_THRESHOLD, RF_PH_ALPHA, RF_SWAP_SIGNIFICANCE, RF_SCALE_FADING = range(11)
CFG_F_SIZE = 12

SCALE_FADING = 0.999
"""Fading factor of the target's mean and mean absolute deviation that normalise the
errors the detectors watch (:mod:`stream.regress.drift`): about the last thousand
records carry the scale."""

FIELDS = ("node_i", "node_f", "lin", "lin_x", "child_table", "scale", "q_edges", "q_stats",
          "q_buf", "q_meta", "c_stats", "free_slots", "state", "cfg_i", "cfg_f", "fmap",
          "adwin_buckets", "adwin_counts", "adwin_state", "ph_state", "free_dets",
          "free_nodes", "events_i", "events_f", "err_scale")
SLOT_TABLES = ("q_edges", "q_stats", "q_buf", "q_meta", "c_stats")

RegressorTables = collections.namedtuple("RegressorTables", FIELDS)


def config_arrays(settings: RegressionSettings) -> tuple[np.ndarray, np.ndarray]:
    """Encode settings into the kernels' integer and float configuration vectors."""
    cfg_i = np.zeros(CFG_I_SIZE, np.int64)
    cfg_f = np.zeros(CFG_F_SIZE, np.float64)
    cfg_i[RC_CRITERION] = REGRESSION_CRITERIA[settings.criterion]
    cfg_i[RC_GRACE] = settings.grace_period
    cfg_i[RC_LEAF_MODEL] = REGRESSION_LEAF_MODELS[settings.leaf_model]
    cfg_i[RC_SPLITS] = REGRESSION_SPLITS[settings.numeric_splits]
    cfg_i[RC_BINS] = settings.bins
    cfg_i[RC_MIN_BRANCH] = settings.min_branch_records
    cfg_i[RC_BINARY_CATS] = int(settings.binary_categories)
    cfg_i[RC_MAX_DEPTH] = settings.max_depth if settings.max_depth is not None else 1 << 30
    cfg_i[RC_BUFFER] = 4 * settings.bins
    cfg_f[RF_DELTA] = settings.delta
    cfg_f[RF_TAU] = settings.tie_threshold
    cfg_f[RF_MEMORY_BYTES] = settings.memory_mb * 2.0 ** 20
    cfg_f[RF_RATE] = settings.learning_rate
    cfg_f[RF_DECAY] = settings.selector_decay
    cfg_i[RC_DETECTOR] = DETECTORS[settings.detector]
    cfg_i[RC_ADWIN_CLOCK] = 32          # river.drift.ADWIN defaults (Bifet & Gavalda 2007),
    cfg_i[RC_ADWIN_BUCKETS] = 5         # as the classifier's (stream.classify.tables.config_arrays)
    cfg_i[RC_ADWIN_MIN_LEN] = 5
    cfg_i[RC_ADWIN_GRACE] = 10
    cfg_f[RF_ADWIN_DELTA] = settings.adwin_delta
    cfg_i[RC_PH_MIN] = 30               # river.drift.PageHinkley defaults
    cfg_i[RC_PH_MODE] = 0
    cfg_f[RF_PH_DELTA] = 0.005
    cfg_f[RF_PH_THRESHOLD] = settings.page_hinkley_threshold
    cfg_f[RF_PH_ALPHA] = 1.0 - 0.0001
    cfg_i[RC_SWAP_AFTER] = settings.swap_after
    cfg_f[RF_SWAP_SIGNIFICANCE] = settings.swap_significance
    cfg_f[RF_SCALE_FADING] = SCALE_FADING
    return cfg_i, cfg_f


def _slot_shapes(slots: int, n_numeric: int, n_cat: int, cats: int, bins: int,
                 buffer: int) -> dict:
    return {"q_edges": (slots, n_numeric, bins - 1),
            "q_stats": (slots, n_numeric, bins, 3),
            "q_buf": (slots, n_numeric, buffer, 2),
            "q_meta": (slots, n_numeric, 3),
            "c_stats": (slots, n_cat, cats, 3)}


def allocate(settings: RegressionSettings, feature_kinds: list[str], cats: int = 4,
             nodes: int = 64, slots: int = 32) -> RegressorTables:
    """Empty tables holding a single active root leaf (node 0) with, when drift
    detection is on, a fresh detector."""
    fmap, n_numeric, n_cat = feature_map(feature_kinds)
    cfg_i, cfg_f = config_arrays(settings)
    shapes = _slot_shapes(slots, n_numeric, n_cat, cats, settings.bins, int(cfg_i[RC_BUFFER]))
    shapes.update(detector_shapes(int(cfg_i[RC_DETECTOR]), nodes,
                                  int(cfg_i[RC_ADWIN_BUCKETS])))
    integer = ("q_meta", "adwin_counts")
    arrays = {name: np.zeros(shape, np.int64 if name in integer else np.float64)
              for name, shape in shapes.items()}
    arrays.update(node_arrays(nodes, NODE_F_COLS))
    arrays.update(
        lin=np.zeros((nodes, n_numeric + 1), np.float64),
        lin_x=np.zeros((nodes, n_numeric, 3), np.float64),
        scale=np.zeros((n_numeric + 1, SCALE_COLS), np.float64),
        free_slots=np.arange(slots - 1, -1, -1, dtype=np.int64),
        err_scale=np.zeros(ERR_SCALE_SIZE, np.float64), cfg_i=cfg_i, cfg_f=cfg_f, fmap=fmap)
    t = RegressorTables(**arrays)
    plant_root(t, with_detector=t.cfg_i[RC_DETECTOR] != DETECTORS["off"])
    t.state[S_CREATED] = 1
    return t


def capacities(t: RegressorTables) -> dict:
    """Current capacities: nodes, slots, category codes, child-table entries."""
    return {"nodes": t.node_i.shape[0], "slots": t.free_slots.shape[0],
            "cats": t.c_stats.shape[2], "children": t.child_table.shape[0]}


def grow(t: RegressorTables, nodes: int = 0, slots: int = 0, cats: int = 0,
         children: int = 0) -> RegressorTables:
    """Return tables with at least the given capacities (0 = keep), contents preserved.

    Node capacity carries the detector rows and the event buffer with it. Growing the
    category capacity also re-lays the child table: every multiway branch owns a block
    with one entry per possible category code.
    """
    cap = capacities(t)
    asked = {"nodes": nodes, "slots": slots, "cats": cats, "children": children}
    new = {k: max(v, asked[k]) for k, v in cap.items()}
    arrays = t._asdict()
    arrays["state"] = t.state.copy()
    state = arrays["state"]
    if new["nodes"] != cap["nodes"]:
        grow_node_rows(arrays, t, new["nodes"], int(t.cfg_i[RC_DETECTOR]),
                       int(t.cfg_i[RC_ADWIN_BUCKETS]))
        arrays["lin"] = resized(t.lin, (new["nodes"], t.lin.shape[1]))
        arrays["lin_x"] = resized(t.lin_x, (new["nodes"],) + t.lin_x.shape[1:])
    if new["slots"] != cap["slots"] or new["cats"] != cap["cats"]:
        for name in SLOT_TABLES:
            shape = list(arrays[name].shape)
            shape[0] = new["slots"]
            if name == "c_stats":
                shape[2] = new["cats"]
            arrays[name] = resized(arrays[name], tuple(shape))
    if new["slots"] != cap["slots"]:
        grow_slot_stack(arrays, t, new["slots"])
    if new["cats"] != cap["cats"]:
        arrays["child_table"], arrays["node_i"], state[S_CHILD_USED] = relay_children(
            arrays["child_table"], arrays["node_i"], int(t.state[S_NODES]), new["cats"],
            new["children"])
    elif new["children"] != cap["children"]:
        arrays["child_table"] = resized(t.child_table, (new["children"],), -1)
    return RegressorTables(**arrays)


def check_tables(t: RegressorTables, settings: RegressionSettings,
                 feature_kinds: list[str]) -> RegressorTables:
    """``t`` if its tables fit together and fit ``settings`` and ``feature_kinds``;
    otherwise :class:`ModelFileError` naming the first table that does not. The kernels
    index without bounds checks, so a damaged file must be refused here."""
    fresh = allocate(settings, feature_kinds, cats=1, nodes=1, slots=1)
    check_like(t, fresh, FIELDS)
    nodes, slots, cats = t.node_i.shape[0], t.free_slots.shape[0], t.c_stats.shape[2]
    expected = {"node_i": (nodes, NODE_I_COLS), "node_f": (nodes, NODE_F_COLS),
                "lin": (nodes,) + fresh.lin.shape[1:], "lin_x": (nodes,) + fresh.lin_x.shape[1:],
                "scale": fresh.scale.shape, "free_slots": (slots,), "free_dets": (nodes,),
                "free_nodes": (nodes,), "events_i": (event_capacity(nodes), 4),
                "events_f": (event_capacity(nodes), 2), "err_scale": fresh.err_scale.shape}
    expected.update(_slot_shapes(slots, fresh.q_stats.shape[1], fresh.c_stats.shape[1], cats,
                                 settings.bins, int(fresh.cfg_i[RC_BUFFER])))
    expected.update(detector_shapes(int(fresh.cfg_i[RC_DETECTOR]), nodes,
                                     int(fresh.cfg_i[RC_ADWIN_BUCKETS])))
    for name, shape in expected.items():
        if getattr(t, name).shape != shape:
            raise ModelFileError(f"saved tree: table {name!r} has shape "
                                 f"{getattr(t, name).shape}, expected {shape}")
    s = t.state
    n_nodes, top, used = int(s[S_NODES]), int(s[S_FREE_TOP]), int(s[S_CHILD_USED])
    free_nodes, free_dets, events = int(s[S_FREE_NODES]), int(s[S_FREE_DETS]), int(s[S_EVENTS])
    if not (1 <= n_nodes <= nodes and 0 <= top <= slots
            and 0 <= used <= t.child_table.shape[0] and 0 <= free_nodes <= n_nodes
            and 0 <= free_dets <= nodes and 0 <= events <= t.events_i.shape[0]
            and 0 <= s[S_ROOT] < n_nodes and 0 <= s[S_MAX_DEPTH]):
        raise ModelFileError("saved tree: its counters do not fit its tables")
    node_i = t.node_i[:n_nodes]
    live = node_i[node_i[:, STATUS] < DEAD]
    children = t.child_table[:used]
    dets = live[:, DET]
    bad = ((node_i[:, KIND] < LEAF) | (node_i[:, KIND] > EQUALS)).any() \
        or ((node_i[:, STATUS] < MAIN) | (node_i[:, STATUS] > FREE)).any() \
        or (node_i[:, SLOT] >= slots).any() or (node_i[:, PARENT] >= n_nodes).any() \
        or (node_i[:, FEATURE] >= len(feature_kinds)).any() \
        or (node_i[:, ALT] >= n_nodes).any() or (node_i[:, ALT_OF] >= n_nodes).any() \
        or (node_i[:, DEPTH] > s[S_MAX_DEPTH]).any() or (node_i[:, DEPTH] < 0).any() \
        or (children >= n_nodes).any() or (t.free_slots[:top] >= slots).any() \
        or (t.free_slots[:top] < 0).any() or (t.q_meta[:, :, Q_NEDGES] >= settings.bins).any() \
        or (t.q_meta[:, :, Q_NBUF] > int(fresh.cfg_i[RC_BUFFER])).any() \
        or (t.q_meta < 0).any() \
        or ((t.free_nodes[:free_nodes] < 0) | (t.free_nodes[:free_nodes] >= n_nodes)).any() \
        or ((t.free_dets[:free_dets] < 0) | (t.free_dets[:free_dets] >= nodes)).any() \
        or (dets >= nodes).any() \
        or (fresh.cfg_i[RC_DETECTOR] != DETECTORS["off"] and (dets < 0).any())
    branches = live[live[:, KIND] != LEAF]     # recycled ids may keep a stale block
    bad = bad or (branches[:, FEATURE] < 0).any() or (branches[:, CHILD_START] < 0).any() \
        or (branches[:, CHILD_START] + branches[:, N_CHILDREN] > used).any()
    if bad:
        raise ModelFileError("saved tree: its node or slot tables are inconsistent")
    check_structure(t, len(feature_kinds), int(fresh.cfg_i[RC_DETECTOR]) != DETECTORS["off"])
    return RegressorTables(**{f: np.ascontiguousarray(getattr(t, f)) for f in FIELDS})
