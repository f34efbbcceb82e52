"""The compiled record loop of the Hoeffding tree classifier: route, predict, learn, split.

Every record is handled exactly as if it came alone (test, then train): it is routed to
a leaf, scored there, then learned; when the leaf has seen ``grace_period`` more records
since its last attempt, the best two split candidates are compared with the Hoeffding
bound (Domingos & Hulten, KDD 2000). Batches only amortise the call overhead.

:func:`learn_batch` stops early, returning the index of the first record it did not
handle, when a table has no room for what that record might need; the caller grows
the tables (:mod:`stream.tables`) and calls again from that index.

Functions on the per-record path take the individual tables they touch; rare operations
(splits, activation, the memory budget) take the whole :class:`ClassifierTables` ``t``.
"""

from __future__ import annotations

import math

import numpy as np

from .criteria import criterion_range, hoeffding_bound
from .jit import njit
from .observers import (category_best, category_equals_post, category_log_likelihood,
                        category_update, gaussian_best, gaussian_log_density,
                        gaussian_post, gaussian_update, histogram_best, histogram_post_at,
                        histogram_update)
from .tables import (C_BINARY_CATS, C_CANDIDATES, C_CRITERION, C_GRACE, C_LEAF_MODEL,
                     C_MAX_DEPTH, C_NB_AFTER, C_OBSERVER, C_PREPRUNE, CHILD_START, CREATED,
                     DEPTH, EQUALS, F_DELTA, F_MAX_SHARE, F_MEMORY_BYTES, F_MIN_BRANCH,
                     F_TAU, FEATURE, FM_KIND, FM_LOCAL, FM_SEEN, HITS, KIND, LAST_ATTEMPT, LEAF,
                     MC_CORRECT, MERIT, MULTIWAY, N_CHILDREN, NB_CORRECT, NUMERIC, PARENT,
                     S_ACTIVE, S_CATS_SEEN, S_CHILD_USED, S_CLASSES_SEEN, S_DEACTIVATED,
                     S_FREE_TOP, S_LEARNED, S_LEAVES, S_NODES, S_PRUNED, S_SPLITS, SCORED, SLOT,
                     THRESHOLD, WEIGHT)

MAJORITY, NAIVE_BAYES, ADAPTIVE = 0, 1, 2
GAUSSIAN, HISTOGRAM = 0, 1


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
def route(node_i, node_f, child_table, x):
    """The leaf that scores ``x``, and whether a category with no branch yet sent it
    along the heaviest child on the way."""
    n = 0
    detoured = False
    while node_i[n, KIND] != LEAF:
        c = next_node(node_i, node_f, child_table, n, x)
        if c < 0:
            detoured = True
            c = heaviest_child(node_i, node_f, child_table, n)
        n = c
    return n, detoured


# ---------------------------------------------------------------- leaf models

@njit
def argmax_ranked(scores, n_classes: int, rank) -> int:
    """Index of the highest score; ties go to the class whose label sorts first."""
    best = -1
    for k in range(n_classes):
        if best < 0 or scores[k] > scores[best] or \
                (scores[k] == scores[best] and rank[k] < rank[best]):
            best = k
    return best


@njit
def majority_scores(counts, n: int, n_classes: int, out) -> float:
    """Class shares at leaf ``n`` into ``out``; returns the leaf's total weight."""
    total = 0.0
    for k in range(n_classes):
        total += counts[n, k]
    for k in range(n_classes):
        out[k] = counts[n, k] / total if total > 0.0 else 0.0
    return total


@njit
def naive_bayes_scores(counts, gauss, cats, fmap, n: int, s: int, x, n_classes: int,
                       out) -> None:
    """Naive Bayes class probabilities at leaf ``n`` (slot ``s``): the class prior times,
    per feature, the class's Gaussian density (numeric) or its Laplace-smoothed category
    frequency. Missing values are left out."""
    total = 0.0
    for k in range(n_classes):
        total += counts[n, k]
    top = -math.inf
    for k in range(n_classes):
        c = counts[n, k]
        if c <= 0.0:
            out[k] = -math.inf
            continue
        ll = math.log(c / total)
        for f in range(x.shape[0]):
            v = x[f]
            if math.isnan(v):
                continue
            j = fmap[f, FM_LOCAL]
            if fmap[f, FM_KIND] == 0:
                ll += gaussian_log_density(gauss, s, j, k, v)
            else:
                ll += category_log_likelihood(cats, s, j, k, int(v), fmap[f, FM_SEEN])
        out[k] = ll
        if ll > top:
            top = ll
    acc = 0.0
    for k in range(n_classes):
        out[k] = math.exp(out[k] - top) if out[k] > -math.inf else 0.0
        acc += out[k]
    for k in range(n_classes):
        out[k] /= acc


@njit
def score_leaf(counts, node_i, node_f, gauss, cats, fmap, leaf_model: int, nb_after: int,
               n: int, x, seen: int, rank, mc, nb):
    """Score ``x`` at leaf ``n``: (label, confidence, majority label, naive Bayes label,
    leaf weight). Labels are -1 when undefined (no class yet; naive Bayes not consulted).
    """
    total = majority_scores(counts, n, seen, mc)
    mc_label = argmax_ranked(mc, seen, rank)
    nb_label = -1
    use_nb = False
    s = node_i[n, SLOT]
    if s >= 0 and leaf_model != MAJORITY and total > 0.0:
        naive_bayes_scores(counts, gauss, cats, fmap, n, s, x, seen, nb)
        nb_label = argmax_ranked(nb, seen, rank)
        if leaf_model == NAIVE_BAYES:
            use_nb = total >= nb_after
        else:
            use_nb = node_f[n, NB_CORRECT] >= node_f[n, MC_CORRECT]
    if use_nb:
        return nb_label, nb[nb_label], mc_label, nb_label, total
    if mc_label < 0:
        return -1, 0.0, mc_label, nb_label, total
    return mc_label, mc[mc_label], mc_label, nb_label, total


# ---------------------------------------------------------------- learning at a leaf

@njit
def learn_at_leaf(counts, node_i, node_f, gauss, cats, fmap, n: int, x, k: int,
                  w: float, density: bool) -> None:
    """Add record ``x`` of class ``k`` to leaf ``n``'s counts and, if active, its Gaussian
    and category observers (the histogram observer is fed by :func:`learn_histograms`)."""
    counts[n, k] += w
    a = n
    while a >= 0:
        node_f[a, WEIGHT] += w
        a = node_i[a, PARENT]
    s = node_i[n, SLOT]
    if s < 0:
        return
    for f in range(x.shape[0]):
        v = x[f]
        if math.isnan(v):
            continue
        if fmap[f, FM_KIND] == 0:
            gaussian_update(gauss, s, fmap[f, FM_LOCAL], k, v, w, density)
        else:
            category_update(cats, s, fmap[f, FM_LOCAL], k, int(v), w)


@njit
def learn_histograms(edges, hcounts, buf, meta, fmap, s: int, x, k: int, w: float) -> None:
    """Feed the numeric values of ``x`` to the histogram observers of slot ``s``."""
    for f in range(x.shape[0]):
        v = x[f]
        if fmap[f, FM_KIND] == 0 and not math.isnan(v):
            histogram_update(edges, hcounts, buf, meta, s, fmap[f, FM_LOCAL], k, v, w)


@njit
def note_categories(fmap, state, x) -> None:
    """Remember the highest category code learned per categorical feature."""
    for f in range(x.shape[0]):
        if fmap[f, FM_KIND] == 1 and not math.isnan(x[f]):
            code = int(x[f]) + 1
            if code > fmap[f, FM_SEEN]:
                fmap[f, FM_SEEN] = code
            if code > state[S_CATS_SEEN]:
                state[S_CATS_SEEN] = code


# ---------------------------------------------------------------- capacity and memory

@njit
def leaf_bytes(state, n_numeric: int, n_cat: int, bins: int, buffer: int) -> float:
    """Bytes of statistics an active leaf holds at the class and category counts seen so
    far (``bins`` = 0 without the histogram observer)."""
    classes = max(state[S_CLASSES_SEEN], 2)
    cats = max(state[S_CATS_SEEN], 1)
    per = 7 * n_numeric * classes + n_cat * classes * (cats + 1)
    if bins > 0:
        per += n_numeric * ((bins - 1) + bins * classes + 2 * buffer + 3)
    return 8.0 * max(per, 1)


@njit
def leaf_cap(t) -> int:
    """Most leaves that may hold statistics within the memory budget (at least one)."""
    bins = t.hist_counts.shape[2] if t.hist_meta.shape[0] > 0 else 0
    per = leaf_bytes(t.state, t.gauss.shape[1], t.cats.shape[1], bins, t.hist_buf.shape[2])
    return max(1, int(t.cfg_f[F_MEMORY_BYTES] / per))


@njit
def has_room(t) -> bool:
    """Whether the tables can absorb the largest change one record can cause: a split
    into ``width`` children (plus the leaves the memory budget may reactivate)."""
    width = max(2, t.cats.shape[3] - 1)
    nodes_free = t.node_i.shape[0] - t.state[S_NODES]
    children_free = t.child_table.shape[0] - t.state[S_CHILD_USED]
    needed_slots = min(t.state[S_LEAVES], leaf_cap(t)) + width + 1
    return nodes_free > width + 1 and children_free > width and \
        t.free_slots.shape[0] >= needed_slots


# ---------------------------------------------------------------- leaves and slots

@njit
def new_leaf(t, parent: int, record: int) -> int:
    """Append an inactive leaf under ``parent`` with empty counts."""
    n = t.state[S_NODES]
    t.state[S_NODES] = n + 1
    t.state[S_LEAVES] += 1
    t.node_i[n, :] = 0
    t.node_f[n, :] = 0.0
    t.counts[n, :] = 0.0
    t.node_i[n, KIND] = LEAF
    t.node_i[n, FEATURE] = -1
    t.node_i[n, PARENT] = parent
    t.node_i[n, DEPTH] = t.node_i[parent, DEPTH] + 1 if parent >= 0 else 0
    t.node_i[n, CREATED] = record
    t.node_i[n, SLOT] = -1
    return n


@njit
def activate(t, n: int) -> None:
    """Give leaf ``n`` a cleared statistics slot."""
    top = t.state[S_FREE_TOP] - 1
    t.state[S_FREE_TOP] = top
    s = t.free_slots[top]
    t.gauss[s] = 0.0
    t.cats[s] = 0.0
    if t.hist_meta.shape[0] > 0:
        t.hist_meta[s] = 0
        t.hist_counts[s] = 0.0
    t.node_i[n, SLOT] = s
    t.state[S_ACTIVE] += 1


@njit
def deactivate(t, n: int) -> None:
    """Free leaf ``n``'s statistics slot; its class counts stay and it predicts by majority."""
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

    Promise is the weight a leaf still gets wrong (its records minus its majority count),
    as in the memory management of Domingos & Hulten (2000) and Kirkby (2007). A
    reactivated leaf starts its observers afresh.
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
            promise[m] = t.counts[n].sum() - t.counts[n].max()
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
        if t.node_i[n, SLOT] < 0 and t.node_i[n, DEPTH] < t.cfg_i[C_MAX_DEPTH]:
            activate(t, n)


@njit
def route_to_learn(t, x, record: int) -> int:
    """The leaf that learns ``x``, first growing a branch for a category not seen at a split."""
    n = 0
    while t.node_i[n, KIND] != LEAF:
        c = next_node(t.node_i, t.node_f, t.child_table, n, x)
        if c < 0:
            code = int(x[t.node_i[n, FEATURE]])
            c = new_leaf(t, n, record)
            t.child_table[t.node_i[n, CHILD_START] + code] = c
            activate(t, c)
        n = c
    return n


# ---------------------------------------------------------------- splitting

@njit
def candidate_post(t, n: int, f: int, kind: int, threshold: float, post) -> None:
    """Class weights per branch of a two-way candidate split of leaf ``n``."""
    s = t.node_i[n, SLOT]
    j = t.fmap[f, FM_LOCAL]
    if kind == EQUALS:
        category_equals_post(t.cats, s, j, int(threshold), post)
    elif t.cfg_i[C_OBSERVER] == HISTOGRAM:
        histogram_post_at(t.hist_edges, t.hist_counts, t.hist_meta, s, j, threshold, post)
    else:
        gaussian_post(t.gauss, s, j, threshold, post)


@njit
def split_leaf(t, n: int, f: int, kind: int, threshold: float, merit: float,
               record: int) -> None:
    """Turn leaf ``n`` into a branch on feature ``f``; each child starts from the
    (estimated) class weights of its side, as in the original algorithm."""
    n_classes = t.counts.shape[1]
    width = t.cats.shape[3] - 1 if kind == MULTIWAY else 2
    post = np.zeros((width, n_classes))
    s = t.node_i[n, SLOT]
    if kind == MULTIWAY:
        j = t.fmap[f, FM_LOCAL]
        for code in range(width):
            for k in range(n_classes):
                post[code, k] = t.cats[s, j, k, 1 + code]
    else:
        candidate_post(t, n, f, kind, threshold, post)
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
    for b in range(width):
        total = post[b].sum()
        if kind == MULTIWAY and total == 0.0:
            t.child_table[start + b] = -1
            continue
        c = new_leaf(t, n, record)
        t.counts[c, :] = post[b]
        t.node_f[c, WEIGHT] = total
        t.node_f[c, LAST_ATTEMPT] = total
        t.child_table[start + b] = c
        activate(t, c)
    t.state[S_SPLITS] += 1


@njit
def feature_candidate(t, s: int, f: int, pre, post):
    """Best split of feature ``f`` at slot ``s``: (merit, kind, threshold or code)."""
    j = t.fmap[f, FM_LOCAL]
    criterion = t.cfg_i[C_CRITERION]
    min_fraction = t.cfg_f[F_MIN_BRANCH]
    if t.fmap[f, FM_KIND] == 0:
        if t.cfg_i[C_OBSERVER] == HISTOGRAM:
            m, v = histogram_best(t.hist_edges, t.hist_counts, t.hist_buf, t.hist_meta, s, j,
                                  pre, criterion, min_fraction, post)
        else:
            m, v = gaussian_best(t.gauss, s, j, pre, criterion, min_fraction,
                                 t.cfg_i[C_CANDIDATES], post)
        return m, NUMERIC, v
    m, multiway, code = category_best(t.cats, s, j, t.fmap[f, FM_SEEN], pre, criterion,
                                      min_fraction, t.cfg_i[C_BINARY_CATS] == 1, post)
    return m, MULTIWAY if multiway else EQUALS, float(code)


@njit
def attempt_split(t, n: int, record: int) -> None:
    """Compare the two best split candidates of leaf ``n`` with the Hoeffding bound.

    Candidates are the best split of each feature and, with prepruning, "no split" (the
    null attribute). The leaf splits when the best beats the second by more than eps, or
    when eps has shrunk below the tie threshold. When "no split" wins, or one class
    holds more than ``max_share_to_split`` of the leaf, the leaf is deactivated and the
    memory budget decides whether it is reactivated with fresh observers.
    """
    n_classes = t.counts.shape[1]
    pre = t.counts[n].copy()
    total = pre.sum()
    distinct = 0
    for k in range(n_classes):
        if pre[k] != 0.0:
            distinct += 1
    if distinct < 2:
        return
    n_features = t.fmap.shape[0]
    merits = np.full(n_features + 1, -math.inf)
    kinds = np.zeros(n_features + 1, np.int64)
    values = np.full(n_features + 1, math.nan)
    features = np.full(n_features + 1, -1, np.int64)
    n_cand = 1 if t.cfg_i[C_PREPRUNE] == 1 else 0
    if pre.max() / total > t.cfg_f[F_MAX_SHARE]:
        n_cand = 1
    else:
        post = np.zeros((max(2, t.cats.shape[3] - 1), n_classes))
        s = t.node_i[n, SLOT]
        for f in range(n_features):
            m, kind, v = feature_candidate(t, s, f, pre, post)
            merits[n_cand] = m
            if m > -math.inf:
                kinds[n_cand] = kind
                values[n_cand] = v
                features[n_cand] = f
            n_cand += 1
    if n_cand == 0:
        return
    # best and second best as a stable ascending sort by merit leaves them: last two
    best = 0
    for i in range(n_cand):
        if merits[i] >= merits[best]:
            best = i
    should_split = n_cand < 2
    if not should_split:
        second = 1 if best == 0 else 0
        for i in range(n_cand):
            if i != best and merits[i] >= merits[second]:
                second = i
        eps = hoeffding_bound(criterion_range(t.cfg_i[C_CRITERION], distinct),
                              t.cfg_f[F_DELTA], total)
        should_split = merits[best] - merits[second] > eps or eps < t.cfg_f[F_TAU]
    if not should_split:
        return
    if features[best] < 0:
        deactivate(t, n)
        t.state[S_PRUNED] += 1
    else:
        split_leaf(t, n, features[best], kinds[best], values[best], merits[best], record)
    enforce_leaf_cap(t)


# ---------------------------------------------------------------- the record loops

@njit
def learn_batch(t, X, y, start: int, rank, pred, confidence, leaf) -> int:
    """Score then learn records ``start..`` of ``X``/``y``; returns the first index not done.

    ``pred`` gets the predicted class code (-1 before any class is known), ``confidence``
    the predicted class's probability and ``leaf`` the node that scored the record.
    ``rank`` orders class codes by label, to break ties deterministically.
    """
    n_classes = t.counts.shape[1]
    mc = np.zeros(n_classes)
    nb = np.zeros(n_classes)
    leaf_model = t.cfg_i[C_LEAF_MODEL]
    nb_after = t.cfg_i[C_NB_AFTER]
    grace = t.cfg_i[C_GRACE]
    max_depth = t.cfg_i[C_MAX_DEPTH]
    histogram = t.cfg_i[C_OBSERVER] == HISTOGRAM
    counts, node_i, node_f, child_table = t.counts, t.node_i, t.node_f, t.child_table
    gauss, cats, fmap, state = t.gauss, t.cats, t.fmap, t.state
    room_left = 0
    for i in range(start, X.shape[0]):
        # the room check is costly; after a check, a record can only split once
        if room_left <= 0:
            if not has_room(t):
                return i
            room_left = 1
        x = X[i]
        record = state[S_LEARNED]
        n, detoured = route(node_i, node_f, child_table, x)
        label, conf, mc_label, nb_label, total = score_leaf(
            counts, node_i, node_f, gauss, cats, fmap, leaf_model, nb_after, n, x,
            state[S_CLASSES_SEEN], rank, mc, nb)
        pred[i] = label
        confidence[i] = conf
        leaf[i] = n

        k = y[i]
        node_f[n, SCORED] += 1.0
        if label == k:
            node_f[n, HITS] += 1.0
        if k + 1 > state[S_CLASSES_SEEN]:
            state[S_CLASSES_SEEN] = k + 1
        note_categories(fmap, state, x)
        if detoured:
            n = route_to_learn(t, x, record)
            room_left = 0
        s = node_i[n, SLOT]
        if leaf_model == ADAPTIVE and s >= 0:
            # the same scores as the prediction: the leaf has not changed since
            if total == 0.0 or mc_label == k:
                node_f[n, MC_CORRECT] += 1.0
            if nb_label == k:
                node_f[n, NB_CORRECT] += 1.0
        learn_at_leaf(counts, node_i, node_f, gauss, cats, fmap, n, x, k, 1.0,
                      leaf_model != MAJORITY)
        if histogram and s >= 0:
            learn_histograms(t.hist_edges, t.hist_counts, t.hist_buf, t.hist_meta, fmap, s,
                             x, k, 1.0)
        state[S_LEARNED] = record + 1
        if s < 0:
            continue
        if node_i[n, DEPTH] >= max_depth:
            deactivate(t, n)
            continue
        seen_weight = 0.0
        for c in range(n_classes):
            seen_weight += counts[n, c]
        if seen_weight - node_f[n, LAST_ATTEMPT] >= grace:
            attempt_split(t, n, record + 1)
            node_f[n, LAST_ATTEMPT] = seen_weight
            room_left = 0
    return X.shape[0]


@njit
def predict_batch(t, X, rank, pred, confidence, leaf) -> None:
    """Score records without learning (the same leaf models as :func:`learn_batch`)."""
    n_classes = t.counts.shape[1]
    mc = np.zeros(n_classes)
    nb = np.zeros(n_classes)
    seen = t.state[S_CLASSES_SEEN]
    for i in range(X.shape[0]):
        n, _ = route(t.node_i, t.node_f, t.child_table, X[i])
        label, conf, _, _, _ = score_leaf(
            t.counts, t.node_i, t.node_f, t.gauss, t.cats, t.fmap, t.cfg_i[C_LEAF_MODEL],
            t.cfg_i[C_NB_AFTER], n, X[i], seen, rank, mc, nb)
        pred[i] = label
        confidence[i] = conf
        leaf[i] = n
