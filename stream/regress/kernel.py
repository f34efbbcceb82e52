"""The compiled record loop of the Hoeffding regression tree: route, predict, learn, split.

Every record is handled exactly as if it came alone (test, then train): it is routed to
a leaf, scored there, then learned. A leaf that has observed ``grace_period`` more records
since its last attempt compares its two best split candidates, ranked by variance (or
standard deviation) reduction, with FIMT-DD's ratio test (Ikonomovska, Gama & Dzeroski,
Data Mining and Knowledge Discovery 2011): split when second / best < 1 - eps, eps the
Hoeffding bound for a range of 1 over the records the leaf's split statistics hold, or when
eps < tau. Batches only amortise the call overhead.

Leaf models
    mean      the leaf's target mean.
    linear    t = b + sum_j w_j z_j on inputs standardised with tree-wide running means
              and deviations, z_j = (x_j - mean_j) / sd_j (0 when missing), predicting
              the standardised target t = (y - mean_y) / sd_y as FIMT-DD's perceptrons
              do. Trained by normalised least mean squares (NLMS), stable for any rate
              in (0, 2) whatever the number of inputs, with each step taken in the
              leaf's own standardised coordinates and mapped back onto the tree-wide
              weights (:func:`linear_learn`). Categorical features do not enter it.
    adaptive  per leaf, whichever of the two has the lower faded squared error
              E <- decay E + e^2 (ties go to the linear model), as in river's regressor.
On a split each child starts from its side's target statistics, the parent's linear
model and the parent's faded errors (as in FIMT-DD and river), with empty split statistics.
Leaves keep updating their target statistics and linear model when inactive.

Drift (unless the detector is ``off``)
    Every node on the record's path feeds its detector the normalised absolute error of
    the leaf's own prediction (:mod:`stream.regress.drift`) before the leaf learns;
    alternates growing beside nodes on the path then score and learn the record in
    their own subtrees, watching their own nodes alike (:func:`learn_watched`). While
    alternates grow on a record's path, the prediction returned is the main leaf's and
    the alternates' leaves' predictions weighted by the inverse of their recent mean
    squared normalised error (:func:`blend_with_alternates`); with no alternate it is
    the main leaf's own, so predictions do not depend on the detector until an
    alternate starts.
    Nodes that die (a subtree replaced or an alternate dropped) are recycled at the
    start of the next record, whatever the batch; :func:`learn_batch` returns to Python
    first when events are waiting, which collects them while their nodes still exist.

:func:`learn_batch` stops early, returning the index of the first record it did not
handle, when a table has no room for what that record might need; the caller grows the
tables (:mod:`stream.regress.tables`) and calls again from that index.

Functions on the per-record path take the individual tables they touch and are called
once per record, never per feature or per tree level: every call that passes arrays
pays for reference counting on each of them, which measured more than the work itself
(routing went from about 850 to about 115 ns a record when written without calls).
The detectors are fed once per node on the path (the classifier does the same). Rare
operations (splits, activation, the memory budget, alternates) take the whole
:class:`RegressorTables` ``t``; so do the general forms of the per-record steps that
alternate subtrees use (:func:`learn_watched`), which tests hold to the same results as
the written-out loop (``plain`` in :func:`learn_batch`).
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit
from stream.tree.drift import (A_TOTAL, A_WIDTH, ADWIN, NO_DETECTOR, adwin_update,
                               page_hinkley_update)
from stream.tree.kernel import deactivate, next_node, recycle_dead, spare_slots

from .criteria import split_confident
from .drift import error_scale_update, error_unit, normalised_error
from .nodes import (activate, activate_if_room, enforce_leaf_cap, fresh_detector, leaf_cap,
                    new_leaf, react)
from .splits import category_best, observe, quantile_best, set_filled_edges
from .tables import (ABS_ERROR, ALT, CHILD_START, DEPTH, DET, EQUALS, ERR_LINEAR, ERR_MEAN,
                     ERR_N, ERR_SQ, ERR_SUM, FEATURE, FM_KIND, FM_LOCAL, FM_SEEN, KIND,
                     LAST_ATTEMPT, LEAF, MERIT, MULTIWAY, N_CHILDREN, NUMERIC, OBSERVED,
                     PARENT, RC_ADWIN_BUCKETS, RC_ADWIN_CLOCK, RC_ADWIN_GRACE,
                     RC_ADWIN_MIN_LEN, RC_BINARY_CATS, RC_CRITERION, RC_DETECTOR, RC_GRACE,
                     RC_LEAF_MODEL, RC_MAX_DEPTH, RC_MIN_BRANCH, RC_PH_MIN, RC_PH_MODE,
                     RF_ADWIN_DELTA, RF_DECAY, RF_DELTA, RF_PH_ALPHA, RF_PH_DELTA,
                     RF_PH_THRESHOLD, RF_RATE, RF_SCALE_FADING, RF_TAU, S_ACTIVE, S_ALTS, S_CATS_SEEN,
                     S_WANTS_SLOTS,
                     S_CHILD_USED, S_CREATED, S_DEAD, S_EVENTS, S_FREE_NODES, S_LEARNED,
                     S_LEAVES, S_MAX_DEPTH, S_NODES, S_ROOT, S_SPLITS, SC_INV, SC_M2,
                     SC_MEAN, SC_N, SC_SD, SCORED, SLOT, SQ_ERROR, ST_N, STATUS, THRESHOLD,
                     WEIGHT, Y_M2, Y_MEAN, Y_N)

MEAN, LINEAR, ADAPTIVE = 0, 1, 2
LOCAL_AFTER = 10.0
"""Records of an input a leaf must have seen before its linear model steps in the leaf's
own coordinates."""
MIN_LOCAL_VAR = 1e-12
"""An input whose variance in a leaf is below this share of its tree-wide variance
counts as constant there (and its weight is left alone)."""
PRIOR_SQ_ERROR = 1.0
"""The blend of alternates counts each leaf's squared normalised error as if one record
with the largest error (1) came before its own: a leaf with no record yet weighs 1, one
whose last hundred records erred by 0.1 on average about 50."""


# ---------------------------------------------------------------- routing

@njit(borrows=True)
def route(node_i, node_f, child_table, X, i: int, root: int, count: bool, path):
    """The leaf under ``root`` that scores record ``X[i]``: (leaf, nodes on the path, whether
    a category with no branch yet sent it along the heaviest child on the way). The
    nodes passed, the leaf last, go into ``path``. With ``count``, every node passed
    gains the record's weight: the record will be learned there, and the rows are in
    cache now."""
    # written out without calls: see observe() in stream.regress.splits for why
    n = root
    m = 0
    detoured = False
    while node_i[n, KIND] != LEAF:
        path[m] = n
        m += 1
        if count:
            node_f[n, WEIGHT] += 1.0
        v = X[i, node_i[n, FEATURE]]
        start = node_i[n, CHILD_START]
        kind = node_i[n, KIND]
        if math.isnan(v):
            c = -1
        elif kind == NUMERIC:
            c = child_table[start] if v <= node_f[n, THRESHOLD] else child_table[start + 1]
        elif kind == EQUALS:
            c = child_table[start] if v == node_f[n, THRESHOLD] else child_table[start + 1]
        else:
            code = int(v)
            c = child_table[start + code] if code < node_i[n, N_CHILDREN] else -1
        if c < 0:  # missing, or a category without a branch: the heaviest child
            detoured = detoured or not math.isnan(v)
            weight = -1.0
            for k in range(node_i[n, N_CHILDREN]):
                other = child_table[start + k]
                if other >= 0 and node_f[other, WEIGHT] > weight:
                    c = other
                    weight = node_f[other, WEIGHT]
        n = c
    path[m] = n
    if count:
        node_f[n, WEIGHT] += 1.0
    return n, m + 1, detoured


@njit(borrows=True)
def add_path_weight(node_i, node_f, n: int, root: int, w: float) -> None:
    """Add ``w`` to the weight of ``n`` and of every node above it up to ``root``."""
    while n >= 0:
        node_f[n, WEIGHT] += w
        if n == root:
            break
        n = node_i[n, PARENT]


@njit
def route_to_learn(t, root: int, X, i: int, record: int) -> int:
    """The leaf under ``root`` that learns ``X[i]``, first growing a branch for a category
    not seen at a split (a new leaf with the branch's linear model)."""
    n = root
    while t.node_i[n, KIND] != LEAF:
        c = next_node(t.node_i, t.node_f, t.child_table, n, X[i])
        if c < 0:
            code = int(X[i, t.node_i[n, FEATURE]])
            c = new_leaf(t, n, code, t.node_i[n, STATUS], record, n)
            t.child_table[t.node_i[n, CHILD_START] + code] = c
            activate(t, c)
            enforce_leaf_cap(t)
        n = c
    return n


# ---------------------------------------------------------------- standardisation

@njit
def numeric_columns(fmap) -> np.ndarray:
    """Column of ``X`` of each numeric feature, in local order."""
    count = 0
    for f in range(fmap.shape[0]):
        if fmap[f, FM_KIND] == 0:
            count += 1
    cols = np.empty(count, np.int64)
    for f in range(fmap.shape[0]):
        if fmap[f, FM_KIND] == 0:
            cols[fmap[f, FM_LOCAL]] = f
    return cols


@njit(borrows=True)
def scale_update(scale, cols, X, i: int, y: float) -> None:
    """Add record (``X[i]``, ``y``) to the tree-wide statistics (missing values skipped)
    and refresh the deviations."""
    p = cols.shape[0]
    for j in range(p + 1):
        v = y if j == p else X[i, cols[j]]
        if math.isnan(v):
            continue
        n = scale[j, SC_N] + 1.0
        mean_old = scale[j, SC_MEAN]
        mean = mean_old + (v - mean_old) / n
        m2 = scale[j, SC_M2] + (v - mean_old) * (v - mean)
        scale[j, SC_N] = n
        scale[j, SC_MEAN] = mean
        scale[j, SC_M2] = m2
        if n > 1.0 and m2 > 0.0:
            sd = math.sqrt(m2 / (n - 1.0))
            scale[j, SC_SD] = sd
            scale[j, SC_INV] = 1.0 / sd
        else:
            scale[j, SC_SD] = 0.0
            scale[j, SC_INV] = 0.0


# ---------------------------------------------------------------- leaf models

@njit(borrows=True)
def linear_predict(lin, lin_x, scale, cols, n: int, X, i: int, z) -> float:
    """Standardise record ``X[i]`` into ``z`` and return node ``n``'s standardised
    prediction b + w . z.

    z_j = (x_j - mean_j) / sd_j with the tree-wide statistics (0 while the deviation is
    undefined). A missing x_j takes its mean among the records leaf ``n`` learned (the
    tree-wide mean before the leaf has seen one): inside the leaf's slice of the inputs,
    where its linear model holds.
    """
    p = cols.shape[0]
    t = lin[n, p]
    for j in range(p):
        v = X[i, cols[j]]
        if math.isnan(v):
            v = lin_x[n, j, 1] if lin_x[n, j, 0] > 0.0 else scale[j, SC_MEAN]
        z[j] = (v - scale[j, SC_MEAN]) * scale[j, SC_INV]
        t += lin[n, j] * z[j]
    return t


@njit(borrows=True)
def linear_learn(lin, lin_x, scale, cols, n: int, X, i: int, z, g, y: float,
                 t_hat: float, rate: float) -> None:
    """One normalised least-mean-squares step of node ``n``'s model towards ``y``, taken
    in the leaf's own standardised coordinates; then add ``X[i]`` to the leaf's input
    statistics.

    A leaf covers a slice of the input space where its inputs vary little and sit far
    from the tree-wide means, so plain steps on the tree-wide ``z`` converge slowly along
    the slopes (the input covariance is badly conditioned). The step is therefore the
    NLMS step for inputs u_j = (x_j - leaf mean_j) / leaf sd_j, mapped back onto the
    tree-wide weights (which children copy). An input the leaf has seen fewer than
    ``LOCAL_AFTER`` times is stepped in tree-wide coordinates.
    """
    p = cols.shape[0]
    inv_y = scale[p, SC_INV]
    if inv_y != 0.0:  # else the target's spread is still undefined: nothing to fit yet
        e = (y - scale[p, SC_MEAN]) * inv_y - t_hat
        norm = 1.0
        shift = 0.0
        for j in range(p):
            v = X[i, cols[j]]
            g[j] = 0.0
            if math.isnan(v):
                continue
            cnt = lin_x[n, j, 0]
            m2 = lin_x[n, j, 2]
            inv_j = scale[j, SC_INV]
            if cnt >= LOCAL_AFTER and m2 * inv_j * inv_j > MIN_LOCAL_VAR * (cnt - 1.0):
                # u = d / sd_leaf; the step on w_j is u / (sd_leaf * inv_j), in z units
                inv_var = (cnt - 1.0) / m2
                d = v - lin_x[n, j, 1]
                g[j] = d * inv_var / inv_j
                shift += (lin_x[n, j, 1] - scale[j, SC_MEAN]) * inv_j * g[j]
                norm += d * d * inv_var
            elif cnt >= LOCAL_AFTER:
                continue  # (nearly) constant in this leaf: it explains nothing here
            else:
                g[j] = z[j]
                norm += z[j] * z[j]
        step = rate * e / norm
        for j in range(p):
            lin[n, j] += step * g[j]
        lin[n, p] += step * (1.0 - shift)
    for j in range(p):
        v = X[i, cols[j]]
        if not math.isnan(v):
            cnt = lin_x[n, j, 0] + 1.0
            mean_old = lin_x[n, j, 1]
            mean = mean_old + (v - mean_old) / cnt
            lin_x[n, j, 2] += (v - mean_old) * (v - mean)
            lin_x[n, j, 1] = mean
            lin_x[n, j, 0] = cnt


@njit(borrows=True)
def note_categories(fmap, state, X, i: int) -> None:
    """Remember the highest category code learned per categorical feature."""
    for f in range(fmap.shape[0]):
        if fmap[f, FM_KIND] == 1 and not math.isnan(X[i, f]):
            code = int(X[i, f]) + 1
            if code > fmap[f, FM_SEEN]:
                fmap[f, FM_SEEN] = code
            if code > state[S_CATS_SEEN]:
                state[S_CATS_SEEN] = code


# ---------------------------------------------------------------- one leaf, in general form

@njit(borrows=True)
def leaf_predict(t, n: int, X, i: int, z, cols):
    """Leaf ``n``'s predictions for ``X[i]``: (the one it gives, its mean's, its linear
    model's, the standardised linear prediction). Leaves ``X[i]`` standardised in ``z``."""
    leaf_model = t.cfg_i[RC_LEAF_MODEL]
    n_num = cols.shape[0]
    mean_pred = t.node_f[n, Y_MEAN] if t.node_f[n, Y_N] > 0.0 else 0.0
    t_hat = 0.0
    linear_pred = mean_pred
    p = mean_pred
    if leaf_model != MEAN:
        t_hat = linear_predict(t.lin, t.lin_x, t.scale, cols, n, X, i, z)
        linear_pred = t.scale[n_num, SC_MEAN] + t_hat * t.scale[n_num, SC_SD]
        # adaptive: the mean only while its faded error is strictly lower
        if leaf_model == LINEAR or not t.node_f[n, ERR_MEAN] < t.node_f[n, ERR_LINEAR]:
            p = linear_pred
    return p, mean_pred, linear_pred, t_hat


@njit(borrows=True)
def score_at_leaf(node_f, n: int, target: float, p: float, mean_pred: float,
                  linear_pred: float, adaptive: bool, decay: float) -> None:
    """Count leaf ``n``'s error on this record, and its models' faded errors."""
    err = target - p
    node_f[n, SCORED] += 1.0
    node_f[n, ABS_ERROR] += abs(err)
    node_f[n, SQ_ERROR] += err * err
    if adaptive:
        e_mean = target - mean_pred
        e_lin = target - linear_pred
        node_f[n, ERR_MEAN] = decay * node_f[n, ERR_MEAN] + e_mean * e_mean
        node_f[n, ERR_LINEAR] = decay * node_f[n, ERR_LINEAR] + e_lin * e_lin


@njit
def learn_leaf(t, n: int, root: int, X, i: int, target: float, record: int, detoured: bool,
               t_hat: float, z, g, cols) -> None:
    """Learn record ``X[i]`` at leaf ``n`` of the tree under ``root`` (whose path already
    counted the record's weight), then try a split when the grace period has passed."""
    node_i, node_f = t.node_i, t.node_f
    linear = t.cfg_i[RC_LEAF_MODEL] != MEAN
    if detoured:
        # the record learns on a new branch, not on the path it was scored along
        add_path_weight(node_i, node_f, n, root, -1.0)
        n = route_to_learn(t, root, X, i, record)
        add_path_weight(node_i, node_f, n, root, 1.0)
        if linear:
            t_hat = linear_predict(t.lin, t.lin_x, t.scale, cols, n, X, i, z)
    count = node_f[n, Y_N] + 1.0
    mean_old = node_f[n, Y_MEAN]
    mean = mean_old + (target - mean_old) / count
    node_f[n, Y_M2] += (target - mean_old) * (target - mean)
    node_f[n, Y_MEAN] = mean
    node_f[n, Y_N] = count
    s = node_i[n, SLOT]
    if s >= 0:
        node_f[n, OBSERVED] += 1.0
        if observe(t.q_edges, t.q_stats, t.q_buf, t.q_meta, t.c_stats, t.fmap, s, X, i,
                   target):
            set_filled_edges(t.q_edges, t.q_stats, t.q_buf, t.q_meta, t.fmap, s)
    if linear:
        linear_learn(t.lin, t.lin_x, t.scale, cols, n, X, i, z, g, target, t_hat,
                     t.cfg_f[RF_RATE])
    if s < 0:
        return
    if node_i[n, DEPTH] >= t.cfg_i[RC_MAX_DEPTH]:
        deactivate(t, n)
        return
    if node_f[n, OBSERVED] - node_f[n, LAST_ATTEMPT] >= t.cfg_i[RC_GRACE]:
        node_f[n, LAST_ATTEMPT] = node_f[n, OBSERVED]
        attempt_split(t, n, record + 1)


@njit
def watch_path(t, path, m: int, error: float, record: int, stack, top: int):
    """Feed ``error`` to the detector of every node on ``path``, top down, counting it in
    each node's error estimate (ERR_SUM, ERR_SQ, ERR_N), and act on alarms. Alternates
    met on the way are pushed on ``stack`` (to learn the record next); when one is
    swapped in, the rest of the path is gone and the new subtree is pushed instead.
    Returns (new stack top, whether the path's leaf still stands)."""
    node_i, node_f, cfg_i, cfg_f = t.node_i, t.node_f, t.cfg_i, t.cfg_f
    adwin_buckets, adwin_counts, adwin_state = t.adwin_buckets, t.adwin_counts, t.adwin_state
    use_adwin = cfg_i[RC_DETECTOR] == ADWIN
    for j in range(m):
        nd = path[j]
        # the detector's estimate before the value: ADWIN's window mean, else the node's
        d = node_i[nd, DET]
        if use_adwin:
            width = adwin_state[d, A_WIDTH]
            before = adwin_state[d, A_TOTAL] / width if width > 0 else 0.0
            alarm = adwin_update(adwin_buckets, adwin_counts, adwin_state, d, error,
                                 cfg_f[RF_ADWIN_DELTA], cfg_i[RC_ADWIN_CLOCK],
                                 cfg_i[RC_ADWIN_BUCKETS], cfg_i[RC_ADWIN_MIN_LEN],
                                 cfg_i[RC_ADWIN_GRACE])
        else:
            count = node_f[nd, ERR_N]
            before = node_f[nd, ERR_SUM] / count if count > 0.0 else 0.0
            alarm = page_hinkley_update(t.ph_state, d, error, cfg_i[RC_PH_MIN],
                                        cfg_f[RF_PH_DELTA], cfg_f[RF_PH_THRESHOLD],
                                        cfg_f[RF_PH_ALPHA], cfg_i[RC_PH_MODE])
        node_f[nd, ERR_SUM] += error
        node_f[nd, ERR_SQ] += error * error
        node_f[nd, ERR_N] += 1.0
        if not alarm and node_i[nd, ALT] < 0:
            continue
        now = react(t, nd, alarm, before, record)
        if now != nd:
            stack[top] = now
            return top + 1, False
        a = node_i[nd, ALT]
        if a >= 0:
            stack[top] = a
            top += 1
    return top, True


@njit
def learn_watched(t, root: int, X, i: int, target: float, record: int, unit: float, path,
                  stack, top: int, z, g, cols) -> int:
    """Score and learn record ``X[i]`` in the tree under ``root`` (an alternate subtree, or
    with ``plain`` the main tree), watching drift at every node on its path; alternates
    met on the way are pushed on ``stack``. Returns the new stack top."""
    n, m, detoured = route(t.node_i, t.node_f, t.child_table, X, i, root, True, path)
    p, mean_pred, linear_pred, t_hat = leaf_predict(t, n, X, i, z, cols)
    score_at_leaf(t.node_f, n, target, p, mean_pred, linear_pred,
                  t.cfg_i[RC_LEAF_MODEL] == ADAPTIVE, t.cfg_f[RF_DECAY])
    standing = True
    if t.cfg_i[RC_DETECTOR] != NO_DETECTOR:
        top, standing = watch_path(t, path, m, normalised_error(target - p, unit), record,
                                   stack, top)
    if standing:
        learn_leaf(t, n, root, X, i, target, record, detoured, t_hat, z, g, cols)
    return top


@njit(borrows=True)
def blend_weight(node_f, n: int) -> float:
    """Inverse of leaf ``n``'s recent mean squared normalised error, smoothed by
    ``PRIOR_SQ_ERROR``."""
    return (node_f[n, ERR_N] + 1.0) / (node_f[n, ERR_SQ] + PRIOR_SQ_ERROR)


@njit(borrows=True)
def blend_with_alternates(t, path, m: int, X, i: int, p: float, scratch, z, cols) -> float:
    """The prediction of the main leaf (``path[m - 1]``, predicting ``p``) blended with
    those of the leaves that alternates growing beside nodes on its path reach, each
    weighted by :func:`blend_weight` (the error estimates the swap test also reads;
    Bifet & Gavalda 2009 let the leaves of alternates vote alike)."""
    w = blend_weight(t.node_f, path[m - 1])
    total = w
    acc = w * p
    for j in range(m):
        a = t.node_i[path[j], ALT]
        if a < 0:
            continue
        n, _, _ = route(t.node_i, t.node_f, t.child_table, X, i, a, False, scratch)
        q, _, _, _ = leaf_predict(t, n, X, i, z, cols)
        w = blend_weight(t.node_f, n)
        total += w
        acc += w * q
    return acc / total


@njit(borrows=True)
def predict_one(t, X, i: int, path, scratch, z, cols):
    """(prediction, leaf) for ``X[i]`` without learning: the main leaf's, blended with
    alternates when any grow on its path."""
    n, m, _ = route(t.node_i, t.node_f, t.child_table, X, i, t.state[S_ROOT], False, path)
    p, _, _, _ = leaf_predict(t, n, X, i, z, cols)
    if t.state[S_ALTS] > 0:
        for j in range(m):
            if t.node_i[path[j], ALT] >= 0:
                p = blend_with_alternates(t, path, m, X, i, p, scratch, z, cols)
                break
    return p, n


# ---------------------------------------------------------------- capacity

@njit
def worst_case(t):
    """(nodes, events, child entries) one record can need at most: every tree it passes
    (the main tree, each alternate, each alternate it may start) can grow a new branch
    at each level and start an alternate at each node of its path; the trees growing
    before the record can also split once (an alternate started by this record has
    empty split statistics but for this record: it cannot split yet)."""
    width = max(2, t.c_stats.shape[2])
    depth = t.state[S_MAX_DEPTH] + 2
    growing = 1
    trees = 1
    if t.cfg_i[RC_DETECTOR] != NO_DETECTOR:
        growing = 1 + t.state[S_ALTS]
        trees = growing + depth
    return growing * width + trees * (depth + 1), trees * (2 * depth + 4), \
        growing * (width + 1)


@njit
def has_room(t) -> bool:
    """Whether the tables can absorb the largest change one record can cause (and the
    leaves the memory budget may reactivate)."""
    nodes, events, children = worst_case(t)
    nodes_free = t.node_i.shape[0] - t.state[S_NODES] + t.state[S_FREE_NODES]
    children_free = t.child_table.shape[0] - t.state[S_CHILD_USED]
    events_free = t.events_i.shape[0] - t.state[S_EVENTS]
    return nodes_free > nodes and children_free > children and events_free > events and \
        t.free_slots.shape[0] >= slots_needed(t)


@njit
def slots_needed(t) -> int:
    """Statistics slots the tables must hold before a record is learned: the leaves
    active now or the live leaves the budget allows, plus the spare ones
    (:func:`stream.tree.kernel.spare_slots`)."""
    allowed = min(t.state[S_LEAVES], leaf_cap(t))
    return max(t.state[S_ACTIVE], allowed) + spare_slots(t.state,
                                                       t.cfg_i[RC_DETECTOR] != NO_DETECTOR)


# ---------------------------------------------------------------- splitting

@njit
def start_child(t, parent: int, branch: int, record: int, stats) -> int:
    """A new active leaf under ``parent`` starting from the target statistics ``stats``."""
    c = new_leaf(t, parent, branch, t.node_i[parent, STATUS], record, parent)
    t.node_f[c, Y_N] = stats[0]
    t.node_f[c, Y_MEAN] = stats[1]
    t.node_f[c, Y_M2] = stats[2]
    t.node_f[c, WEIGHT] = stats[0]
    if t.state[S_ACTIVE] < leaf_cap(t):   # the rest wait for enforce_leaf_cap
        activate_if_room(t, c)
    return c


@njit
def split_leaf(t, n: int, f: int, kind: int, threshold: float, merit: float, record: int,
               left, right) -> None:
    """Turn leaf ``n`` into a branch on feature ``f``; two-way splits give the children
    ``left`` and ``right`` statistics, a multiway split one child per code seen. The new
    branch watches its error afresh."""
    s = t.node_i[n, SLOT]
    width = t.c_stats.shape[2] if kind == MULTIWAY else 2
    start = t.state[S_CHILD_USED]
    t.state[S_CHILD_USED] = start + width
    deactivate(t, n)
    t.node_i[n, KIND] = kind
    t.node_i[n, FEATURE] = f
    t.node_i[n, CHILD_START] = start
    t.node_i[n, N_CHILDREN] = width
    t.node_f[n, THRESHOLD] = threshold
    t.node_f[n, MERIT] = merit
    t.state[S_LEAVES] -= 1
    if t.node_i[n, DET] >= 0:
        fresh_detector(t, n)
    if kind == MULTIWAY:
        j = t.fmap[f, FM_LOCAL]
        for code in range(width):
            if t.c_stats[s, j, code, ST_N] > 0.0:
                t.child_table[start + code] = start_child(t, n, code, record,
                                                           t.c_stats[s, j, code])
            else:
                t.child_table[start + code] = -1
    else:
        t.child_table[start] = start_child(t, n, 0, record, left)
        t.child_table[start + 1] = start_child(t, n, 1, record, right)
    t.state[S_SPLITS] += 1


@njit
def attempt_split(t, n: int, record: int) -> None:
    """Compare the two best split candidates of leaf ``n`` with FIMT-DD's ratio test.

    Candidates are the best split of each feature, ranked by their merit; ties go to the
    later feature, as a stable sort by merit would leave them.
    """
    s = t.node_i[n, SLOT]
    n_features = t.fmap.shape[0]
    criterion = t.cfg_i[RC_CRITERION]
    min_records = float(t.cfg_i[RC_MIN_BRANCH])
    merits = np.full(n_features, -math.inf)
    kinds = np.zeros(n_features, np.int64)
    values = np.full(n_features, math.nan)
    lefts = np.zeros((n_features, 3))
    rights = np.zeros((n_features, 3))
    scratch = np.zeros((max(t.q_stats.shape[2], t.c_stats.shape[2]) + 1, 3))
    for f in range(n_features):
        j = t.fmap[f, FM_LOCAL]
        if t.fmap[f, FM_KIND] == 0:
            m, v = quantile_best(t.q_edges, t.q_stats, t.q_buf, t.q_meta, s, j, criterion,
                                 min_records, scratch, lefts[f], rights[f])
            merits[f] = m
            kinds[f] = NUMERIC
            values[f] = v
        else:
            m, multiway, code = category_best(t.c_stats, s, j, t.fmap[f, FM_SEEN], criterion,
                                              min_records, t.cfg_i[RC_BINARY_CATS] == 1,
                                              scratch, lefts[f], rights[f])
            merits[f] = m
            kinds[f] = MULTIWAY if multiway else EQUALS
            values[f] = math.nan if multiway else float(code)
    best = 0
    for f in range(n_features):
        if merits[f] >= merits[best]:
            best = f
    second = -math.inf
    for f in range(n_features):
        if f != best and merits[f] > second:
            second = merits[f]
    if not split_confident(merits[best], second, t.node_f[n, OBSERVED], t.cfg_f[RF_DELTA],
                           t.cfg_f[RF_TAU]):
        return
    split_leaf(t, n, best, kinds[best], values[best], merits[best], record, lefts[best],
               rights[best])
    enforce_leaf_cap(t)


# ---------------------------------------------------------------- the record loops

@njit(nogil=True)
def learn_batch(t, X, y, start: int, pred, leaf, plain: bool) -> int:
    """Score then learn records ``start..`` of ``X``/``y``; returns the first index not done.

    ``pred`` gets the prediction made before the record was learned, ``leaf`` the main
    tree's leaf that made it. The per-record path of the main tree (route, predict,
    detectors, learning at the leaf) is written out here; ``plain`` takes the general
    functions alternates use instead (:func:`predict_one`, :func:`learn_watched`), for
    tests that hold the two to the same results.
    """
    leaf_model = t.cfg_i[RC_LEAF_MODEL]
    grace = t.cfg_i[RC_GRACE]
    max_depth = t.cfg_i[RC_MAX_DEPTH]
    rate = t.cfg_f[RF_RATE]
    decay = t.cfg_f[RF_DECAY]
    fading = t.cfg_f[RF_SCALE_FADING]
    watching = t.cfg_i[RC_DETECTOR] != NO_DETECTOR
    use_adwin = t.cfg_i[RC_DETECTOR] == ADWIN
    adwin_delta, adwin_clock = t.cfg_f[RF_ADWIN_DELTA], t.cfg_i[RC_ADWIN_CLOCK]
    adwin_max, adwin_min_len = t.cfg_i[RC_ADWIN_BUCKETS], t.cfg_i[RC_ADWIN_MIN_LEN]
    adwin_grace = t.cfg_i[RC_ADWIN_GRACE]
    ph_min, ph_delta, ph_threshold = t.cfg_i[RC_PH_MIN], t.cfg_f[RF_PH_DELTA], \
        t.cfg_f[RF_PH_THRESHOLD]
    ph_alpha, ph_mode = t.cfg_f[RF_PH_ALPHA], t.cfg_i[RC_PH_MODE]
    node_i, node_f, child_table, lin, lin_x, scale = t.node_i, t.node_f, t.child_table, \
        t.lin, t.lin_x, t.scale
    q_edges, q_stats, q_buf, q_meta, c_stats = t.q_edges, t.q_stats, t.q_buf, t.q_meta, \
        t.c_stats
    adwin_buckets, adwin_counts, adwin_state = t.adwin_buckets, t.adwin_counts, t.adwin_state
    ph_state, err_scale = t.ph_state, t.err_scale
    fmap, state = t.fmap, t.state
    cols = numeric_columns(fmap)
    z = np.zeros(cols.shape[0])
    g = np.zeros(cols.shape[0])
    linear = leaf_model != MEAN
    categorical = cols.shape[0] < fmap.shape[0]
    n_num = cols.shape[0]
    path = np.empty(node_i.shape[0] + 1, np.int64)
    scratch = np.empty(node_i.shape[0] + 1, np.int64)
    stack = np.empty(node_i.shape[0] + 1, np.int64)
    if state[S_WANTS_SLOTS] != 0:     # leaves left waiting for slots take them first
        state[S_WANTS_SLOTS] = 0
        enforce_leaf_cap(t)
        if state[S_WANTS_SLOTS] != 0:
            return start
    room_left = 0
    splits = state[S_SPLITS]
    for i in range(start, X.shape[0]):
        if state[S_DEAD] > 0:
            if state[S_EVENTS] > 0:
                return i          # let Python read the events while their nodes exist
            recycle_dead(t)
        # the room check is costly; it is repeated only after the tree changed
        if room_left <= 0:
            if not has_room(t):
                return i
            room_left = 1
        target = y[i]
        record = state[S_LEARNED]
        root = state[S_ROOT]
        unit = error_unit(err_scale)
        changes = state[S_CREATED] + state[S_EVENTS]
        top = 0
        if plain:
            pred[i], leaf[i] = predict_one(t, X, i, path, scratch, z, cols)
            if categorical:
                note_categories(fmap, state, X, i)
            top = learn_watched(t, root, X, i, target, record, unit, path, stack, 0, z, g,
                                cols)
        else:
            n, m, detoured = route(node_i, node_f, child_table, X, i, root, True, path)
            mean_pred = node_f[n, Y_MEAN] if node_f[n, Y_N] > 0.0 else 0.0
            t_hat = 0.0
            linear_pred = mean_pred
            p = mean_pred
            if linear:
                t_hat = linear_predict(lin, lin_x, scale, cols, n, X, i, z)
                linear_pred = scale[n_num, SC_MEAN] + t_hat * scale[n_num, SC_SD]
                # adaptive: the mean only while its faded error is strictly lower
                if leaf_model == LINEAR or not node_f[n, ERR_MEAN] < node_f[n, ERR_LINEAR]:
                    p = linear_pred
            pred[i] = p
            leaf[i] = n
            if watching and state[S_ALTS] > 0:
                for j in range(m):
                    if node_i[path[j], ALT] >= 0:
                        pred[i] = blend_with_alternates(t, path, m, X, i, p, scratch, z, cols)
                        if linear:    # the blend standardised other leaves' inputs into z
                            t_hat = linear_predict(lin, lin_x, scale, cols, n, X, i, z)
                        break

            err = target - p
            node_f[n, SCORED] += 1.0
            node_f[n, ABS_ERROR] += abs(err)
            node_f[n, SQ_ERROR] += err * err
            if leaf_model == ADAPTIVE:
                e_mean = target - mean_pred
                e_lin = target - linear_pred
                node_f[n, ERR_MEAN] = decay * node_f[n, ERR_MEAN] + e_mean * e_mean
                node_f[n, ERR_LINEAR] = decay * node_f[n, ERR_LINEAR] + e_lin * e_lin
            if categorical:
                note_categories(fmap, state, X, i)

            # ---- drift: every node on the path watches the leaf's normalised error
            standing = True
            if watching:
                error = normalised_error(err, unit)
                for j in range(m):
                    nd = path[j]
                    # the detector fed inline, as in watch_path: a call passing eight
                    # tables per node cost more than the detector's own work
                    d = node_i[nd, DET]
                    if use_adwin:
                        width = adwin_state[d, A_WIDTH]
                        before = adwin_state[d, A_TOTAL] / width if width > 0 else 0.0
                        alarm = adwin_update(adwin_buckets, adwin_counts, adwin_state, d,
                                             error, adwin_delta, adwin_clock, adwin_max,
                                             adwin_min_len, adwin_grace)
                    else:
                        count = node_f[nd, ERR_N]
                        before = node_f[nd, ERR_SUM] / count if count > 0.0 else 0.0
                        alarm = page_hinkley_update(ph_state, d, error, ph_min, ph_delta,
                                                    ph_threshold, ph_alpha, ph_mode)
                    node_f[nd, ERR_SUM] += error
                    node_f[nd, ERR_SQ] += error * error
                    node_f[nd, ERR_N] += 1.0
                    if not alarm and node_i[nd, ALT] < 0:
                        continue
                    now = react(t, nd, alarm, before, record)
                    if now != nd:        # swapped in: the rest of the path is gone and the
                        stack[top] = now  # new subtree learns the record instead
                        top += 1
                        standing = False
                        break
                    a = node_i[nd, ALT]
                    if a >= 0:
                        stack[top] = a
                        top += 1

            # ---- learn at the leaf
            if standing:
                if detoured:
                    # the record learns on a new branch, not on the path it was scored along
                    add_path_weight(node_i, node_f, n, root, -1.0)
                    n = route_to_learn(t, root, X, i, record)
                    add_path_weight(node_i, node_f, n, root, 1.0)
                    if linear:
                        t_hat = linear_predict(lin, lin_x, scale, cols, n, X, i, z)
                # the leaf's target statistics (the weights on its path were counted by route)
                count = node_f[n, Y_N] + 1.0
                mean_old = node_f[n, Y_MEAN]
                mean = mean_old + (target - mean_old) / count
                node_f[n, Y_M2] += (target - mean_old) * (target - mean)
                node_f[n, Y_MEAN] = mean
                node_f[n, Y_N] = count
                s = node_i[n, SLOT]
                if s >= 0:
                    node_f[n, OBSERVED] += 1.0
                    if observe(q_edges, q_stats, q_buf, q_meta, c_stats, fmap, s, X, i,
                               target):
                        set_filled_edges(q_edges, q_stats, q_buf, q_meta, fmap, s)
                if linear:
                    linear_learn(lin, lin_x, scale, cols, n, X, i, z, g, target, t_hat, rate)
                if s >= 0:
                    if node_i[n, DEPTH] >= max_depth:
                        deactivate(t, n)
                    elif node_f[n, OBSERVED] - node_f[n, LAST_ATTEMPT] >= grace:
                        node_f[n, LAST_ATTEMPT] = node_f[n, OBSERVED]
                        attempt_split(t, n, record + 1)

        # ---- alternates, and a subtree just swapped in, learn the record too
        while top > 0:
            top -= 1
            top = learn_watched(t, stack[top], X, i, target, record, unit, path, stack, top,
                                z, g, cols)
        # the tree-wide scales take the record once every tree has learned it
        scale_update(scale, cols, X, i, target)
        if watching:
            error_scale_update(err_scale, target, fading)
        state[S_LEARNED] = record + 1
        if state[S_WANTS_SLOTS] != 0:
            return i + 1          # leaves wait for slots: Python grows the tables
        if state[S_CREATED] + state[S_EVENTS] != changes or state[S_SPLITS] != splits:
            room_left = 0
            splits = state[S_SPLITS]
    return X.shape[0]


@njit
def predict_batch(t, X, pred, leaf) -> None:
    """Score records without learning (the same predictions as :func:`learn_batch`)."""
    cols = numeric_columns(t.fmap)
    z = np.zeros(cols.shape[0])
    path = np.empty(t.node_i.shape[0] + 1, np.int64)
    scratch = np.empty(t.node_i.shape[0] + 1, np.int64)
    for i in range(X.shape[0]):
        pred[i], leaf[i] = predict_one(t, X, i, path, scratch, z, cols)
