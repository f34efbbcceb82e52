"""The compiled record loop of the Hoeffding regression tree: route, predict, learn, split.

Every record is handled exactly as if it came alone (test, then train): it is routed to
a leaf, scored there, then learned. A leaf that has observed ``grace_period`` more records
since its last attempt compares its two best split candidates, ranked by variance (or
standard deviation) reduction, with FIMT-DD's ratio test (Ikonomovska, Gama & Dzeroski,
Data Mining and Knowledge Discovery 2011): split when second / best < 1 - eps, eps the
Hoeffding bound for a range of 1 over the records the leaf's observers hold, or when
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
model and the parent's faded errors (as in FIMT-DD and river), with empty observers.
Leaves keep updating their target statistics and linear model when inactive.

:func:`learn_batch` stops early, returning the index of the first record it did not
handle, when a table has no room for what that record might need; the caller grows the
tables (:mod:`stream.regression_tables`) and calls again from that index.

Functions on the per-record path take the individual tables they touch and are called
once per record, never per feature or per tree level: every call that passes arrays
pays for reference counting on each of them, which measured more than the work itself
(routing went from about 850 to about 115 ns a record when written without calls).
Rare operations (splits, activation, the memory budget) take the whole
:class:`RegressorTables` ``t``.
"""

from __future__ import annotations

import math

import numpy as np

from .jit import njit
from .regression_criteria import split_confident
from .regression_observers import category_best, observe, quantile_best
from .regression_tables import (ABS_ERROR, CHILD_START, CREATED, DEPTH, EQUALS, ERR_LINEAR,
                                ERR_MEAN, FEATURE, FM_KIND, FM_LOCAL, FM_SEEN, KIND,
                                LAST_ATTEMPT, LEAF, MERIT, MULTIWAY, N_CHILDREN, NUMERIC,
                                OBSERVED, PARENT, RC_BINARY_CATS, RC_CRITERION, RC_GRACE,
                                RC_LEAF_MODEL, RC_MAX_DEPTH, RC_MIN_BRANCH, RF_DECAY,
                                RF_DELTA, RF_MEMORY_BYTES, RF_RATE, RF_TAU, S_ACTIVE,
                                S_CATS_SEEN, S_CHILD_USED, S_DEACTIVATED, S_FREE_TOP,
                                S_LEARNED, S_LEAVES, S_NODES, S_SPLITS, SC_INV, SC_M2, SC_MEAN,
                                SC_N, SC_SD, SCORED, SLOT, SQ_ERROR, ST_N, THRESHOLD, WEIGHT,
                                Y_M2, Y_MEAN, Y_N)

MEAN, LINEAR, ADAPTIVE = 0, 1, 2
LOCAL_AFTER = 10.0
"""Records of an input a leaf must have seen before its linear model steps in the leaf's
own coordinates."""
MIN_LOCAL_VAR = 1e-12
"""An input whose variance in a leaf is below this share of its tree-wide variance
counts as constant there (and its weight is left alone)."""


# ---------------------------------------------------------------- routing

@njit
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


@njit
def route(node_i, node_f, child_table, X, i: int, count: bool):
    """The leaf that scores record ``X[i]``, and whether a category with no branch yet
    sent it along the heaviest child on the way. With ``count``, every node passed
    (the leaf too) gains the record's weight: the record will be learned there, and the
    rows are in cache now."""
    # written out without calls: see observe() in regression_observers for why
    n = 0
    detoured = False
    while node_i[n, KIND] != LEAF:
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
    if count:
        node_f[n, WEIGHT] += 1.0
    return n, detoured


@njit
def add_path_weight(node_i, node_f, n: int, w: float) -> None:
    """Add ``w`` to the weight of ``n`` and of every node above it."""
    while n >= 0:
        node_f[n, WEIGHT] += w
        n = node_i[n, PARENT]


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


@njit
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

@njit
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


@njit
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


@njit
def note_categories(fmap, state, X, i: int) -> None:
    """Remember the highest category code learned per categorical feature."""
    for f in range(fmap.shape[0]):
        if fmap[f, FM_KIND] == 1 and not math.isnan(X[i, f]):
            code = int(X[i, f]) + 1
            if code > fmap[f, FM_SEEN]:
                fmap[f, FM_SEEN] = code
            if code > state[S_CATS_SEEN]:
                state[S_CATS_SEEN] = code


# ---------------------------------------------------------------- capacity and memory

@njit
def leaf_bytes(state, n_numeric: int, n_cat: int, bins: int, buffer: int) -> float:
    """Bytes of observers an active leaf holds at the category counts seen so far."""
    cats = max(state[S_CATS_SEEN], 1)
    per = n_numeric * ((bins - 1) + 3 * bins + 2 * buffer + 3) + n_cat * 3 * cats
    return 8.0 * max(per, 1)


@njit
def leaf_cap(t) -> int:
    """Most leaves that may hold observers within the memory budget (at least one)."""
    per = leaf_bytes(t.state, t.q_stats.shape[1], t.c_stats.shape[1], t.q_stats.shape[2],
                     t.q_buf.shape[2])
    return max(1, int(t.cfg_f[RF_MEMORY_BYTES] / per))


@njit
def has_room(t) -> bool:
    """Whether the tables can absorb the largest change one record can cause: a split
    into ``width`` children (plus the leaves the memory budget may reactivate)."""
    width = max(2, t.c_stats.shape[2])
    nodes_free = t.node_i.shape[0] - t.state[S_NODES]
    children_free = t.child_table.shape[0] - t.state[S_CHILD_USED]
    needed_slots = min(t.state[S_LEAVES], leaf_cap(t)) + width + 1
    return nodes_free > width + 1 and children_free > width and \
        t.free_slots.shape[0] >= needed_slots


# ---------------------------------------------------------------- leaves and slots

@njit
def new_leaf(t, parent: int, record: int) -> int:
    """Append an inactive leaf under ``parent``: empty statistics, the parent's linear
    model and faded errors."""
    n = t.state[S_NODES]
    t.state[S_NODES] = n + 1
    t.state[S_LEAVES] += 1
    t.node_i[n, :] = 0
    t.node_f[n, :] = 0.0
    t.node_i[n, KIND] = LEAF
    t.node_i[n, FEATURE] = -1
    t.node_i[n, PARENT] = parent
    t.node_i[n, DEPTH] = t.node_i[parent, DEPTH] + 1 if parent >= 0 else 0
    t.node_i[n, CREATED] = record
    t.node_i[n, SLOT] = -1
    t.lin_x[n] = 0.0
    if parent >= 0:
        t.lin[n, :] = t.lin[parent, :]
        t.node_f[n, ERR_MEAN] = t.node_f[parent, ERR_MEAN]
        t.node_f[n, ERR_LINEAR] = t.node_f[parent, ERR_LINEAR]
    else:
        t.lin[n, :] = 0.0
    return n


@njit
def activate(t, n: int) -> None:
    """Give leaf ``n`` a cleared observer slot."""
    top = t.state[S_FREE_TOP] - 1
    t.state[S_FREE_TOP] = top
    s = t.free_slots[top]
    t.q_meta[s] = 0
    t.q_stats[s] = 0.0
    t.c_stats[s] = 0.0
    t.node_i[n, SLOT] = s
    t.node_f[n, OBSERVED] = 0.0
    t.node_f[n, LAST_ATTEMPT] = 0.0
    t.state[S_ACTIVE] += 1


@njit
def deactivate(t, n: int) -> None:
    """Free leaf ``n``'s observer slot; it keeps predicting and learning its models."""
    s = t.node_i[n, SLOT]
    if s < 0:
        return
    top = t.state[S_FREE_TOP]
    t.free_slots[top] = s
    t.state[S_FREE_TOP] = top + 1
    t.node_i[n, SLOT] = -1
    t.state[S_ACTIVE] -= 1


@njit
def enforce_leaf_cap(t) -> None:
    """Keep the most promising leaves active, at most the cap; reactivate others if room.

    Promise is the squared error the leaf's mean still leaves (its target M2), the
    regression analogue of the classifier's "records still misclassified". A reactivated
    leaf starts its observers afresh.
    """
    cap = leaf_cap(t)
    n_leaves = t.state[S_LEAVES]
    if t.state[S_ACTIVE] == n_leaves and n_leaves <= cap:
        return
    ids = np.empty(n_leaves, np.int64)
    promise = np.empty(n_leaves, np.float64)
    m = 0
    for n in range(t.state[S_NODES]):
        if t.node_i[n, KIND] == LEAF:
            ids[m] = n
            promise[m] = t.node_f[n, Y_M2]
            m += 1
    order = np.argsort(promise[:m], kind="mergesort")
    keep = min(cap, m)
    for r in range(m - keep):
        n = ids[order[r]]
        if t.node_i[n, SLOT] >= 0:
            deactivate(t, n)
            t.state[S_DEACTIVATED] += 1
    for r in range(m - keep, m):
        n = ids[order[r]]
        if t.node_i[n, SLOT] < 0 and t.node_i[n, DEPTH] < t.cfg_i[RC_MAX_DEPTH]:
            activate(t, n)


@njit
def route_to_learn(t, X, i: int, record: int) -> int:
    """The leaf that learns ``X[i]``, first growing a branch for a category not seen at
    a split."""
    n = 0
    while t.node_i[n, KIND] != LEAF:
        c = next_node(t.node_i, t.node_f, t.child_table, n, X[i])
        if c < 0:
            code = int(X[i, t.node_i[n, FEATURE]])
            c = new_leaf(t, n, record)
            t.child_table[t.node_i[n, CHILD_START] + code] = c
            activate(t, c)
        n = c
    return n


# ---------------------------------------------------------------- splitting

@njit
def start_child(t, parent: int, record: int, stats) -> int:
    """A new active leaf under ``parent`` starting from the target statistics ``stats``."""
    c = new_leaf(t, parent, record)
    t.node_f[c, Y_N] = stats[0]
    t.node_f[c, Y_MEAN] = stats[1]
    t.node_f[c, Y_M2] = stats[2]
    t.node_f[c, WEIGHT] = stats[0]
    activate(t, c)
    return c


@njit
def split_leaf(t, n: int, f: int, kind: int, threshold: float, merit: float, record: int,
               left, right) -> None:
    """Turn leaf ``n`` into a branch on feature ``f``; two-way splits give the children
    ``left`` and ``right`` statistics, a multiway split one child per code seen."""
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
    if kind == MULTIWAY:
        j = t.fmap[f, FM_LOCAL]
        for code in range(width):
            if t.c_stats[s, j, code, ST_N] > 0.0:
                t.child_table[start + code] = start_child(t, n, record, t.c_stats[s, j, code])
            else:
                t.child_table[start + code] = -1
    else:
        t.child_table[start] = start_child(t, n, record, left)
        t.child_table[start + 1] = start_child(t, n, record, right)
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

@njit
def learn_batch(t, X, y, start: int, pred, leaf) -> int:
    """Score then learn records ``start..`` of ``X``/``y``; returns the first index not done.

    ``pred`` gets the prediction made before the record was learned, ``leaf`` the node
    that made it.
    """
    leaf_model = t.cfg_i[RC_LEAF_MODEL]
    grace = t.cfg_i[RC_GRACE]
    max_depth = t.cfg_i[RC_MAX_DEPTH]
    rate = t.cfg_f[RF_RATE]
    decay = t.cfg_f[RF_DECAY]
    node_i, node_f, child_table, lin, lin_x, scale = t.node_i, t.node_f, t.child_table, \
        t.lin, t.lin_x, t.scale
    q_edges, q_stats, q_buf, q_meta, c_stats = t.q_edges, t.q_stats, t.q_buf, t.q_meta, \
        t.c_stats
    fmap, state = t.fmap, t.state
    cols = numeric_columns(fmap)
    z = np.zeros(cols.shape[0])
    g = np.zeros(cols.shape[0])
    linear = leaf_model != MEAN
    categorical = cols.shape[0] < fmap.shape[0]
    n_num = cols.shape[0]
    room_left = 0
    for i in range(start, X.shape[0]):
        # the room check is costly; after a check, a record can only split once
        if room_left <= 0:
            if not has_room(t):
                return i
            room_left = 1
        target = y[i]
        record = state[S_LEARNED]
        n, detoured = route(node_i, node_f, child_table, X, i, True)
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
        if detoured:
            # the record learns on a new branch, not on the path it was scored along
            add_path_weight(node_i, node_f, n, -1.0)
            n = route_to_learn(t, X, i, record)
            add_path_weight(node_i, node_f, n, 1.0)
            room_left = 0
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
            observe(q_edges, q_stats, q_buf, q_meta, c_stats, fmap, s, X, i, target)
        if linear:
            linear_learn(lin, lin_x, scale, cols, n, X, i, z, g, target, t_hat, rate)
        scale_update(scale, cols, X, i, target)
        state[S_LEARNED] = record + 1
        if s < 0:
            continue
        if node_i[n, DEPTH] >= max_depth:
            deactivate(t, n)
            continue
        if node_f[n, OBSERVED] - node_f[n, LAST_ATTEMPT] >= grace:
            node_f[n, LAST_ATTEMPT] = node_f[n, OBSERVED]
            attempt_split(t, n, record + 1)
            room_left = 0
    return X.shape[0]


@njit
def predict_batch(t, X, pred, leaf) -> None:
    """Score records without learning (the same leaf models as :func:`learn_batch`)."""
    leaf_model = t.cfg_i[RC_LEAF_MODEL]
    cols = numeric_columns(t.fmap)
    n_num = cols.shape[0]
    z = np.zeros(n_num)
    for i in range(X.shape[0]):
        n, _ = route(t.node_i, t.node_f, t.child_table, X, i, False)
        p = t.node_f[n, Y_MEAN] if t.node_f[n, Y_N] > 0.0 else 0.0
        if leaf_model == LINEAR or (leaf_model == ADAPTIVE
                                    and not t.node_f[n, ERR_MEAN] < t.node_f[n, ERR_LINEAR]):
            t_hat = linear_predict(t.lin, t.lin_x, t.scale, cols, n, X, i, z)
            p = t.scale[n_num, SC_MEAN] + t_hat * t.scale[n_num, SC_SD]
        pred[i] = p
        leaf[i] = n
