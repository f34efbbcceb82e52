"""The compiled record loop of the Hoeffding tree classifier: route, predict, learn, split.

Every record is handled exactly as if it came alone (test, then train): it is routed to
a leaf, scored there, then learned; when the leaf has seen ``grace_period`` more records
since its last attempt, the best two split candidates are compared with the Hoeffding
bound (Domingos & Hulten, KDD 2000). Batches only amortise the call overhead.

:func:`learn_batch` stops early, returning the index of the first record it did not
handle, when a table has no room for what that record might need; the caller grows
the tables (:mod:`stream.classify.tables`) and calls again from that index.

Functions on the per-record path take the individual tables they touch; rare operations
(splits, activation, the memory budget) take the whole :class:`ClassifierTables` ``t``.
What the regression tree does alike with its nodes (routing through a branch, the birth
and death of nodes, swapping alternates in) is in :mod:`stream.tree.kernel`.
"""

from __future__ import annotations

import math

import numpy as np

from stream.jit import njit
from stream.tree.bound import hoeffding_bound
from stream.tree.drift import (ADWIN, NO_DETECTOR, adwin_mean, adwin_reset, adwin_update,
                               page_hinkley_reset, page_hinkley_rose, page_hinkley_update)
from stream.tree.kernel import (add_event, deactivate, heaviest_child, kill_subtree,
                                next_node, place_leaf, recycle_dead, slot_to_spare,
                                spare_slots, swap_in_alternate, take_detector_row)

from .criteria import criterion_range
from .splits import (category_best, category_equals_post, category_log_likelihood,
                     category_update, gaussian_fallback_density, gaussian_pooled,
                     gaussian_best, gaussian_log_density, gaussian_post, gaussian_update,
                     histogram_best, histogram_post_at, histogram_update)
from .tables import (ALT, ALT_OF, ALTERNATE, BRANCH, C_ADWIN_BUCKETS, C_ADWIN_CLOCK,
                     C_ADWIN_GRACE, C_ADWIN_MIN_LEN, C_BINARY_CATS, C_CANDIDATES,
                     C_CRITERION, C_DETECTOR, C_GRACE, C_LEAF_MODEL, C_MAX_DEPTH,
                     C_NB_AFTER, C_SPLITS, C_PH_MIN, C_PH_MODE, C_PREPRUNE, C_SWAP_AFTER,
                     CHILD_START, DEPTH, DET, EQUALS, ERR_N, ERR_SUM, EV_ALARM, EV_DROP,
                     EV_START, EV_SWAP, F_ADWIN_DELTA, F_DELTA, F_MAX_SHARE, F_MEMORY_BYTES,
                     F_MIN_BRANCH, F_PH_ALPHA, F_PH_DELTA, F_PH_THRESHOLD,
                     F_SWAP_SIGNIFICANCE, F_TAU, FEATURE, FM_KIND, FM_LOCAL, FM_SEEN, G_LLA,
                     HITS, KIND, LAST_ATTEMPT, LEAF, MC_CORRECT, MERIT, MULTIWAY,
                     N_CHILDREN, NB_CORRECT, NUMERIC, PARENT, S_ACTIVE, S_ALARMS, S_ALTS,
                     S_CATS_SEEN, S_CHILD_USED, S_CLASSES_SEEN, S_CREATED, S_DEACTIVATED,
                     S_DEAD, S_DROPS, S_EVENTS, S_FREE_NODES, S_FREE_TOP, S_LEARNED,
                     S_LEAVES, S_MAX_DEPTH, S_NODES, S_PRUNED, S_ROOT, S_SPLITS, S_STARTS,
                     S_WANTS_SLOTS, SCORED, SLOT, STATUS, THRESHOLD, WEIGHT)

MAJORITY, NAIVE_BAYES, ADAPTIVE = 0, 1, 2
GAUSSIAN, HISTOGRAM = 0, 1


# ---------------------------------------------------------------- routing

@njit(borrows=True)
def route(node_i, node_f, child_table, root: int, x, path):
    """Walk from ``root`` to the leaf that scores ``x``, writing the nodes passed into
    ``path``. Returns (leaf, nodes on the path, whether a category with no branch yet
    sent the record along the heaviest child)."""
    n = root
    m = 0
    detoured = False
    while node_i[n, KIND] != LEAF:
        path[m] = n
        m += 1
        c = next_node(node_i, node_f, child_table, n, x)
        if c < 0:
            detoured = True
            c = heaviest_child(node_i, node_f, child_table, n)
        n = c
    path[m] = n
    return n, m + 1, detoured


# ---------------------------------------------------------------- leaf models

@njit(borrows=True)
def argmax_ranked(scores, n_classes: int, rank) -> int:
    """Index of the highest score; ties go to the class whose label sorts first."""
    best = -1
    for k in range(n_classes):
        if best < 0 or scores[k] > scores[best] or \
                (scores[k] == scores[best] and rank[k] < rank[best]):
            best = k
    return best


@njit(borrows=True)
def majority_scores(counts, n: int, n_classes: int, out) -> float:
    """Class shares at leaf ``n`` into ``out``; returns the leaf's total weight."""
    total = 0.0
    for k in range(n_classes):
        total += counts[n, k]
    for k in range(n_classes):
        out[k] = counts[n, k] / total if total > 0.0 else 0.0
    return total


@njit(borrows=True)
def naive_bayes_scores(counts, gauss, cats, fmap, n: int, s: int, x, n_classes: int,
                       out) -> None:
    """Naive Bayes class probabilities at leaf ``n`` (slot ``s``): the class prior times,
    per feature, the class's Gaussian density (numeric) or its Laplace-smoothed category
    frequency. Missing values are left out. A class whose values of a feature have no
    spread yet (fewer than two, or all equal) gets a density with the leaf's pooled
    variance, so that it neither wins nor loses for lack of evidence."""
    total = 0.0
    for k in range(n_classes):
        total += counts[n, k]
    for k in range(n_classes):
        c = counts[n, k]
        out[k] = math.log(c / total) if c > 0.0 else -math.inf
    for f in range(x.shape[0]):
        v = x[f]
        if math.isnan(v):
            continue
        j = fmap[f, FM_LOCAL]
        if fmap[f, FM_KIND] == 0:
            pooled = False
            pooled_mean = 0.0
            pooled_var = 0.0
            for k in range(n_classes):
                if counts[n, k] > 0.0:
                    if gauss[s, j, k, G_LLA] != 0.0:
                        out[k] += gaussian_log_density(gauss, s, j, k, v)
                    else:
                        if not pooled:   # once per feature, and only when needed
                            pooled_mean, pooled_var = gaussian_pooled(gauss, s, j, n_classes)
                            pooled = True
                        out[k] += gaussian_fallback_density(gauss, s, j, k, v, pooled_mean,
                                                            pooled_var)
        else:
            for k in range(n_classes):
                if counts[n, k] > 0.0:
                    out[k] += category_log_likelihood(cats, s, j, k, int(v), fmap[f, FM_SEEN])
    top = -math.inf
    for k in range(n_classes):
        if out[k] > top:
            top = out[k]
    acc = 0.0
    for k in range(n_classes):
        out[k] = math.exp(out[k] - top) if out[k] > -math.inf else 0.0
        acc += out[k]
    for k in range(n_classes):
        out[k] /= acc


@njit(borrows=True)
def score_leaf(counts, node_i, node_f, gauss, cats, fmap, leaf_model: int, nb_after: int,
               n: int, x, seen: int, rank, mc, nb):
    """Score ``x`` at leaf ``n``: (label, confidence, majority label, naive Bayes label,
    leaf weight, whether naive Bayes gave the label). Labels are -1 when undefined (no
    class yet; naive Bayes not consulted). The probabilities are left in ``mc``/``nb``.
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
        return nb_label, nb[nb_label], mc_label, nb_label, total, True
    if mc_label < 0:
        return -1, 0.0, mc_label, nb_label, total, False
    return mc_label, mc[mc_label], mc_label, nb_label, total, False


@njit(borrows=True)
def vote_with_alternates(t, path, m: int, x, seen: int, rank, mc, nb, votes, scratch):
    """(label, confidence) of the main leaf voting with the leaves of the alternates that
    grow beside nodes on its path (Bifet & Gavalda 2009): each leaf's class probabilities
    weighted by 1 / e^2, e its Laplace-smoothed error rate since its estimate was reset."""
    votes[:] = 0.0
    for i in range(m + 1):
        if i < m:
            a = t.node_i[path[i], ALT]
            if a < 0:
                continue
            n, _, _ = route(t.node_i, t.node_f, t.child_table, a, x, scratch)
        else:
            n = path[m - 1]
        label, _, _, _, _, used_nb = score_leaf(
            t.counts, t.node_i, t.node_f, t.gauss, t.cats, t.fmap, t.cfg_i[C_LEAF_MODEL],
            t.cfg_i[C_NB_AFTER], n, x, seen, rank, mc, nb)
        if label < 0:
            continue
        source = nb if used_nb else mc
        e = (t.node_f[n, ERR_SUM] + 1.0) / (t.node_f[n, ERR_N] + 2.0)
        weight = 1.0 / (e * e)
        for k in range(seen):
            votes[k] += weight * source[k]
    label = argmax_ranked(votes, seen, rank)
    if label < 0:
        return -1, 0.0
    total = votes[:seen].sum()
    return label, votes[label] / total if total > 0.0 else 0.0


# ---------------------------------------------------------------- learning at a leaf

@njit(borrows=True)
def learn_at_leaf(counts, node_i, node_f, gauss, cats, fmap, n: int, x, k: int,
                  w: float, density: bool) -> None:
    """Add record ``x`` of class ``k`` to leaf ``n``'s counts and, if active, its Gaussian
    and category statistics (the histogram split statistic is fed by :func:`learn_histograms`)."""
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
    """Feed the numeric values of ``x`` to the histogram split statistics of slot ``s``."""
    for f in range(x.shape[0]):
        v = x[f]
        if fmap[f, FM_KIND] == 0 and not math.isnan(v):
            histogram_update(edges, hcounts, buf, meta, s, fmap[f, FM_LOCAL], k, v, w)


@njit(borrows=True)
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

@njit(borrows=True)
def leaf_bytes(state, n_numeric: int, n_cat: int, bins: int, buffer: int) -> float:
    """Bytes of statistics an active leaf holds at the class and category counts seen so
    far (``bins`` = 0 without the histogram split statistic)."""
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
def worst_case(t):
    """Nodes, events and child entries one record can create at most: every tree it
    passes (the main tree, each alternate, each alternate it may start) can grow a branch
    and start an alternate at each node of its path; the trees growing before the record
    can also split once (an alternate started by this record holds one record, one
    class: it cannot split yet)."""
    width = max(2, t.cats.shape[3] - 1)
    depth = t.state[S_MAX_DEPTH] + 2
    growing = 1
    trees = 1
    if t.cfg_i[C_DETECTOR] != NO_DETECTOR:
        growing = 1 + t.state[S_ALTS]
        trees = growing + depth
    return (growing * width + trees * (depth + 1), trees * (2 * depth + 4),
            growing * (width + 1), width)


@njit
def slots_needed(t) -> int:
    """Statistics slots the tables must hold before a record is learned: the leaves
    active now or the live leaves the budget allows, plus the spare ones
    (:func:`stream.tree.kernel.spare_slots`)."""
    allowed = min(t.state[S_LEAVES], leaf_cap(t))
    return max(t.state[S_ACTIVE], allowed) + spare_slots(t.state, watches(t))


@njit(borrows=True)
def watches(t) -> bool:
    """Whether drift detection is on (alternates may grow)."""
    return t.cfg_i[C_DETECTOR] != NO_DETECTOR


@njit
def has_room(t) -> bool:
    """Whether the tables can absorb the largest change one record can cause."""
    nodes, events, children, width = worst_case(t)
    nodes_free = t.node_i.shape[0] - t.state[S_NODES] + t.state[S_FREE_NODES]
    children_free = t.child_table.shape[0] - t.state[S_CHILD_USED]
    events_free = t.events_i.shape[0] - t.state[S_EVENTS]
    return nodes_free > nodes and children_free > children and events_free > events and \
        t.free_slots.shape[0] >= slots_needed(t)


# ---------------------------------------------------------------- nodes, slots, detectors

@njit
def new_leaf(t, parent: int, branch: int, status: int, record: int) -> int:
    """A fresh inactive leaf under ``parent`` at child position ``branch``, with empty
    counts and, when drift detection is on, a fresh detector."""
    n = place_leaf(t, parent, branch, status, record)
    t.counts[n, :] = 0.0
    if t.cfg_i[C_DETECTOR] != NO_DETECTOR:
        take_detector_row(t, n)
        fresh_detector(t, n)
    return n


@njit
def fresh_detector(t, n: int) -> None:
    """Reset node ``n``'s detector and its error estimate."""
    d = t.node_i[n, DET]
    if d >= 0:
        if t.cfg_i[C_DETECTOR] == ADWIN:
            adwin_reset(t.adwin_buckets, t.adwin_counts, t.adwin_state, d)
        else:
            page_hinkley_reset(t.ph_state, d)
    t.node_f[n, ERR_SUM] = 0.0
    t.node_f[n, ERR_N] = 0.0


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
def activate_if_room(t, n: int) -> None:
    """Activate leaf ``n`` if a slot is free beyond the spare ones (else it waits)."""
    if slot_to_spare(t.state, watches(t)):
        activate(t, n)


@njit
def enforce_leaf_cap(t) -> None:
    """Keep the most promising leaves active, at most the cap; reactivate others if room.

    Promise is the weight a leaf still gets wrong (its records minus its majority count),
    as in the memory management of Domingos & Hulten (2000) and Kirkby (2007). A
    reactivated leaf starts its split statistics afresh.
    """
    cap = leaf_cap(t)
    n_leaves = t.state[S_LEAVES]
    if t.state[S_ACTIVE] == n_leaves and n_leaves <= cap:
        return
    ids = np.empty(n_leaves, np.int64)
    promise = np.empty(n_leaves, np.float64)
    m = 0
    for n in range(t.state[S_NODES]):
        if t.node_i[n, KIND] == LEAF and t.node_i[n, STATUS] <= ALTERNATE:
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
            activate_if_room(t, n)


@njit
def route_to_learn(t, root: int, x, record: int) -> int:
    """The leaf under ``root`` that learns ``x``, first growing a branch for a category
    not seen at a split."""
    n = root
    while t.node_i[n, KIND] != LEAF:
        c = next_node(t.node_i, t.node_f, t.child_table, n, x)
        if c < 0:
            code = int(x[t.node_i[n, FEATURE]])
            c = new_leaf(t, n, code, t.node_i[n, STATUS], record)
            t.child_table[t.node_i[n, CHILD_START] + code] = c
            activate(t, c)
            enforce_leaf_cap(t)
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
    elif t.cfg_i[C_SPLITS] == HISTOGRAM:
        histogram_post_at(t.hist_edges, t.hist_counts, t.hist_meta, s, j, threshold, post)
    else:
        gaussian_post(t.gauss, s, j, threshold, post)


@njit
def split_leaf(t, n: int, f: int, kind: int, threshold: float, merit: float,
               record: int) -> None:
    """Turn leaf ``n`` into a branch on feature ``f``; each child starts from the
    (estimated) class weights of its side, as in the original algorithm. The new branch
    watches its error afresh."""
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
    fresh_detector(t, n)
    for b in range(width):
        total = post[b].sum()
        if kind == MULTIWAY and total == 0.0:
            t.child_table[start + b] = -1
            continue
        c = new_leaf(t, n, b, t.node_i[n, STATUS], record)
        t.counts[c, :] = post[b]
        t.node_f[c, WEIGHT] = total
        t.node_f[c, LAST_ATTEMPT] = total
        t.child_table[start + b] = c
        if t.state[S_ACTIVE] < leaf_cap(t):   # the rest wait for enforce_leaf_cap
            activate_if_room(t, c)
    t.state[S_SPLITS] += 1


@njit
def feature_candidate(t, s: int, f: int, pre, post):
    """Best split of feature ``f`` at slot ``s``: (merit, kind, threshold or code)."""
    j = t.fmap[f, FM_LOCAL]
    criterion = t.cfg_i[C_CRITERION]
    min_fraction = t.cfg_f[F_MIN_BRANCH]
    if t.fmap[f, FM_KIND] == 0:
        if t.cfg_i[C_SPLITS] == HISTOGRAM:
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
    memory budget decides whether it is reactivated with fresh split statistics.
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


# ---------------------------------------------------------------- drift: alternates

@njit(borrows=True)
def error_rate(node_f, n: int) -> float:
    """Node ``n``'s error rate since its estimate was last reset (0 before any record)."""
    count = node_f[n, ERR_N]
    return node_f[n, ERR_SUM] / count if count > 0.0 else 0.0


@njit
def start_alternate(t, n: int, record: int) -> int:
    """Grow a fresh alternate leaf beside branch ``n`` (replacing an older alternate)."""
    old = t.node_i[n, ALT]
    if old >= 0:
        add_event(t.events_i, t.events_f, t.state, EV_DROP, n, record, old,
                  error_rate(t.node_f, n), error_rate(t.node_f, old))
        kill_subtree(t, old)
        t.state[S_DROPS] += 1
        t.state[S_ALTS] -= 1
    a = new_leaf(t, t.node_i[n, PARENT], t.node_i[n, BRANCH], ALTERNATE, record)
    t.node_i[a, DEPTH] = t.node_i[n, DEPTH]
    t.node_i[a, ALT_OF] = n
    t.node_i[n, ALT] = a
    activate(t, a)
    t.state[S_ALTS] += 1
    t.state[S_STARTS] += 1
    add_event(t.events_i, t.events_f, t.state, EV_START, n, record, a, 0.0, 0.0)
    return a


@njit(borrows=True)
def detect(node_i, node_f, adwin_buckets, adwin_counts, adwin_state, ph_state, cfg_i, cfg_f,
           n: int, error: float):
    """Feed node ``n``'s detector one error and count it in the node's error estimate.
    Returns (alarm, the detector's error estimate before this value)."""
    d = node_i[n, DET]
    if cfg_i[C_DETECTOR] == ADWIN:
        before = adwin_mean(adwin_state, d)
        alarm = adwin_update(adwin_buckets, adwin_counts, adwin_state, d, error,
                             cfg_f[F_ADWIN_DELTA], cfg_i[C_ADWIN_CLOCK],
                             cfg_i[C_ADWIN_BUCKETS], cfg_i[C_ADWIN_MIN_LEN],
                             cfg_i[C_ADWIN_GRACE])
    else:
        before = error_rate(node_f, n)
        alarm = page_hinkley_update(ph_state, d, error, cfg_i[C_PH_MIN], cfg_f[F_PH_DELTA],
                                    cfg_f[F_PH_THRESHOLD], cfg_f[F_PH_ALPHA],
                                    cfg_i[C_PH_MODE])
    node_f[n, ERR_SUM] += error
    node_f[n, ERR_N] += 1.0
    return alarm, before


@njit
def react(t, n: int, alarm: bool, before: float, record: int) -> int:
    """Act on node ``n``'s detector (Bifet & Gavalda 2009).

    An alarm while the error rose starts an alternate beside the node. With an
    alternate, once both have been scored on more than ``swap_after`` records, the
    alternate replaces the node when its error is lower by more than
    sqrt(2 p (1 - p) ln(2 / significance) (1/n_alt + 1/n_main)), or is dropped when it is
    higher by that much. Returns the node now standing where ``n`` stood (``n`` itself
    unless an alternate was swapped in).
    """
    d = t.node_i[n, DET]
    if alarm:
        t.state[S_ALARMS] += 1
        if t.cfg_i[C_DETECTOR] == ADWIN:
            # ADWIN has cut its window to the part after the change: compare its mean
            # with the whole window's before (Bifet & Gavalda 2009: the detector's estimate before and after the change)
            after = adwin_mean(t.adwin_state, d)
            rose = after > before
        else:
            after = error_rate(t.node_f, n)
            rose = page_hinkley_rose(t.ph_state, d, t.cfg_f[F_PH_THRESHOLD])
        add_event(t.events_i, t.events_f, t.state, EV_ALARM, n, record, -1, before, after)
        # the error estimate restarts at every alarm: it is what the swap test weighs
        # against an alternate grown from here on
        t.node_f[n, ERR_SUM] = 0.0
        t.node_f[n, ERR_N] = 0.0
        if rose:
            start_alternate(t, n, record)
        return n
    a = t.node_i[n, ALT]
    if a < 0:
        return n
    n_main = t.node_f[n, ERR_N]
    n_alt = t.node_f[a, ERR_N]
    threshold = t.cfg_i[C_SWAP_AFTER]
    if n_alt <= threshold or n_main <= threshold:
        return n
    p_main = error_rate(t.node_f, n)
    p_alt = error_rate(t.node_f, a)
    bound = math.sqrt(2.0 * p_main * (1.0 - p_main)
                      * math.log(2.0 / t.cfg_f[F_SWAP_SIGNIFICANCE])
                      * (1.0 / n_alt + 1.0 / n_main))
    if bound < p_main - p_alt:
        add_event(t.events_i, t.events_f, t.state, EV_SWAP, n, record, a, p_main, p_alt)
        return swap_in_alternate(t, n, record)
    if bound < p_alt - p_main:
        add_event(t.events_i, t.events_f, t.state, EV_DROP, n, record, a, p_main, p_alt)
        t.node_i[n, ALT] = -1
        t.state[S_ALTS] -= 1
        t.state[S_DROPS] += 1
        kill_subtree(t, a)
    return n


@njit
def watch_path(t, path, m: int, error: float, record: int, stack, top: int):
    """Feed the error of this record's leaf to every node on its path, top down, and act
    on alarms. Alternates met on the way are pushed on ``stack`` (to learn the record
    next); when one is swapped in, the rest of the path is gone and the new subtree is
    pushed instead. Returns (new stack top, whether the path's leaf still stands)."""
    node_i, node_f = t.node_i, t.node_f
    for i in range(m):
        n = path[i]
        alarm, before = detect(node_i, node_f, t.adwin_buckets, t.adwin_counts,
                               t.adwin_state, t.ph_state, t.cfg_i, t.cfg_f, n, error)
        if not alarm and node_i[n, ALT] < 0:
            continue
        now = react(t, n, alarm, before, record)
        if now != n:
            stack[top] = now
            return top + 1, False
        a = node_i[n, ALT]
        if a >= 0:
            stack[top] = a
            top += 1
    return top, True


@njit
def learn_leaf_record(t, n: int, root: int, x, k: int, record: int, detoured: bool,
                      mc_label: int, nb_label: int, total: float) -> None:
    """Learn record ``x`` (class ``k``) at leaf ``n`` of the tree under ``root``, then try
    a split when the grace period has passed."""
    if detoured:
        n = route_to_learn(t, root, x, record)
    s = t.node_i[n, SLOT]
    if t.cfg_i[C_LEAF_MODEL] == ADAPTIVE and s >= 0:
        # the same scores as the prediction: the leaf has not changed since
        if total == 0.0 or mc_label == k:
            t.node_f[n, MC_CORRECT] += 1.0
        if nb_label == k:
            t.node_f[n, NB_CORRECT] += 1.0
    learn_at_leaf(t.counts, t.node_i, t.node_f, t.gauss, t.cats, t.fmap, n, x, k, 1.0,
                  t.cfg_i[C_LEAF_MODEL] != MAJORITY)
    if t.cfg_i[C_SPLITS] == HISTOGRAM and s >= 0:
        learn_histograms(t.hist_edges, t.hist_counts, t.hist_buf, t.hist_meta, t.fmap, s,
                         x, k, 1.0)
    if s < 0:
        return
    if t.node_i[n, DEPTH] >= t.cfg_i[C_MAX_DEPTH]:
        deactivate(t, n)
        return
    seen_weight = t.counts[n].sum()
    if seen_weight - t.node_f[n, LAST_ATTEMPT] >= t.cfg_i[C_GRACE]:
        attempt_split(t, n, record + 1)
        t.node_f[n, LAST_ATTEMPT] = seen_weight


@njit
def learn_watched(t, root: int, x, k: int, record: int, path, rank, mc, nb, stack,
                  top: int, known: bool, leaf: int, m: int, detoured: bool, label: int,
                  mc_label: int, nb_label: int, total: float) -> int:
    """Learn one record in the tree under ``root`` with drift watching at every node on its
    path; alternates met on the way are pushed on ``stack`` to learn the record next.
    With ``known``, the route and scores of the prediction are reused. Returns the new
    stack top."""
    if not known:
        leaf, m, detoured = route(t.node_i, t.node_f, t.child_table, root, x, path)
        label, _, mc_label, nb_label, total, _ = score_leaf(
            t.counts, t.node_i, t.node_f, t.gauss, t.cats, t.fmap, t.cfg_i[C_LEAF_MODEL],
            t.cfg_i[C_NB_AFTER], leaf, x, t.state[S_CLASSES_SEEN], rank, mc, nb)
    top, standing = watch_path(t, path, m, 0.0 if label == k else 1.0, record, stack, top)
    if standing:
        learn_leaf_record(t, leaf, root, x, k, record, detoured, mc_label, nb_label, total)
    return top


# ---------------------------------------------------------------- the record loops

@njit(nogil=True)
def learn_batch(t, X, y, start: int, rank, pred, confidence, leaf) -> int:
    """Score then learn records ``start..`` of ``X``/``y``; returns the first index not done.

    ``pred`` gets the predicted class code (-1 before any class is known), ``confidence``
    the predicted class's probability and ``leaf`` the node that scored the record.
    ``rank`` orders class codes by label, to break ties deterministically.

    The per-record path (route, majority score, learning at the leaf) is written out
    here rather than called: a call that passes arrays costs reference counting per
    array, which dominated the loop. The same steps exist as functions above for the
    rarer paths (alternate subtrees), and tests hold the two to the same results.
    """
    n_classes = t.counts.shape[1]
    mc = np.zeros(n_classes)
    nb = np.zeros(n_classes)
    leaf_model = t.cfg_i[C_LEAF_MODEL]
    nb_after = t.cfg_i[C_NB_AFTER]
    grace = t.cfg_i[C_GRACE]
    max_depth = t.cfg_i[C_MAX_DEPTH]
    histogram = t.cfg_i[C_SPLITS] == HISTOGRAM
    watching = t.cfg_i[C_DETECTOR] != NO_DETECTOR
    density = leaf_model != MAJORITY
    counts, node_i, node_f, child_table = t.counts, t.node_i, t.node_f, t.child_table
    gauss, cats, fmap, state = t.gauss, t.cats, t.fmap, t.state
    adwin_buckets, adwin_counts, adwin_state = t.adwin_buckets, t.adwin_counts, t.adwin_state
    ph_state, cfg_i, cfg_f = t.ph_state, t.cfg_i, t.cfg_f
    n_features = fmap.shape[0]
    has_categories = t.cats.shape[1] > 0
    path = np.empty(t.node_i.shape[0] + 1, np.int64)
    scratch = np.empty(t.node_i.shape[0] + 1, np.int64)
    stack = np.empty(t.node_i.shape[0] + 1, np.int64)
    votes = np.zeros(n_classes)
    if state[S_WANTS_SLOTS] != 0:     # leaves left waiting for slots take them first
        state[S_WANTS_SLOTS] = 0
        enforce_leaf_cap(t)
        if state[S_WANTS_SLOTS] != 0:
            return start
    room_left = 0
    classes_seen = state[S_CLASSES_SEEN]
    cats_seen = state[S_CATS_SEEN]
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
        x = X[i]
        record = state[S_LEARNED]
        root = state[S_ROOT]

        # ---- route
        n = root
        m = 0
        detoured = False
        while node_i[n, KIND] != LEAF:
            path[m] = n
            m += 1
            v = x[node_i[n, FEATURE]]
            begin = node_i[n, CHILD_START]
            kind = node_i[n, KIND]
            if v != v:
                c = heaviest_child(node_i, node_f, child_table, n)
            elif kind == NUMERIC:
                c = child_table[begin] if v <= node_f[n, THRESHOLD] else child_table[begin + 1]
            elif kind == EQUALS:
                c = child_table[begin] if v == node_f[n, THRESHOLD] else child_table[begin + 1]
            else:
                code = int(v)
                c = child_table[begin + code] if code < node_i[n, N_CHILDREN] else -1
                if c < 0:
                    detoured = True
                    c = heaviest_child(node_i, node_f, child_table, n)
            n = c
        path[m] = n
        m += 1

        # ---- score: majority, then naive Bayes where the leaf model asks for it
        seen = state[S_CLASSES_SEEN]
        total = 0.0
        mc_label = -1
        for k in range(seen):
            w = counts[n, k]
            total += w
            if mc_label < 0 or w > counts[n, mc_label] or \
                    (w == counts[n, mc_label] and rank[k] < rank[mc_label]):
                mc_label = k
        label = mc_label
        conf = counts[n, mc_label] / total if mc_label >= 0 and total > 0.0 else 0.0
        nb_label = -1
        s = node_i[n, SLOT]
        if s >= 0 and density and total > 0.0:
            naive_bayes_scores(counts, gauss, cats, fmap, n, s, x, seen, nb)
            nb_label = argmax_ranked(nb, seen, rank)
            if (total >= nb_after) if leaf_model == NAIVE_BAYES else \
                    node_f[n, NB_CORRECT] >= node_f[n, MC_CORRECT]:
                label = nb_label
                conf = nb[nb_label]
        pred[i] = label
        confidence[i] = conf
        leaf[i] = n
        if watching and state[S_ALTS] > 0:
            for j in range(m):
                if node_i[path[j], ALT] >= 0:
                    pred[i], confidence[i] = vote_with_alternates(
                        t, path, m, x, seen, rank, mc, nb, votes, scratch)
                    if s >= 0 and density and total > 0.0:   # the main leaf's own scores
                        naive_bayes_scores(counts, gauss, cats, fmap, n, s, x, seen, nb)
                    break

        k = y[i]
        node_f[n, SCORED] += 1.0
        if pred[i] == k:
            node_f[n, HITS] += 1.0
        if k + 1 > state[S_CLASSES_SEEN]:
            state[S_CLASSES_SEEN] = k + 1
        if has_categories:
            note_categories(fmap, state, x)
        if state[S_CLASSES_SEEN] != classes_seen or state[S_CATS_SEEN] != cats_seen:
            classes_seen = state[S_CLASSES_SEEN]   # an active leaf now costs more:
            cats_seen = state[S_CATS_SEEN]         # hold the memory budget again
            enforce_leaf_cap(t)
            room_left = 0
        changes = state[S_CREATED] + state[S_EVENTS]

        # ---- drift: every node on the path watches the leaf's error
        top = 0
        standing = True
        if watching:
            error = 0.0 if label == k else 1.0
            for j in range(m):
                nd = path[j]
                alarm, before = detect(node_i, node_f, adwin_buckets, adwin_counts,
                                       adwin_state, ph_state, cfg_i, cfg_f, nd, error)
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
                n = route_to_learn(t, root, x, record)
                s = node_i[n, SLOT]
            if leaf_model == ADAPTIVE and s >= 0:
                # the same scores as the prediction: the leaf has not changed since
                if total == 0.0 or mc_label == k:
                    node_f[n, MC_CORRECT] += 1.0
                if nb_label == k:
                    node_f[n, NB_CORRECT] += 1.0
            counts[n, k] += 1.0
            a = n
            while a >= 0:
                node_f[a, WEIGHT] += 1.0
                a = node_i[a, PARENT]
            if s >= 0:
                for f in range(n_features):
                    v = x[f]
                    if v != v:
                        continue
                    if fmap[f, FM_KIND] == 0:
                        gaussian_update(gauss, s, fmap[f, FM_LOCAL], k, v, 1.0, density)
                    else:
                        category_update(cats, s, fmap[f, FM_LOCAL], k, int(v), 1.0)
                if histogram:
                    learn_histograms(t.hist_edges, t.hist_counts, t.hist_buf, t.hist_meta,
                                     fmap, s, x, k, 1.0)
                if node_i[n, DEPTH] >= max_depth:
                    deactivate(t, n)
                else:
                    seen_weight = 0.0
                    for c in range(n_classes):
                        seen_weight += counts[n, c]
                    if seen_weight - node_f[n, LAST_ATTEMPT] >= grace:
                        attempt_split(t, n, record + 1)
                        node_f[n, LAST_ATTEMPT] = seen_weight

        # ---- alternates, and a subtree just swapped in, learn the record too
        while top > 0:
            top -= 1
            top = learn_watched(t, stack[top], x, k, record, path, rank, mc, nb, stack,
                                top, False, 0, 0, False, 0, 0, 0, 0.0)
        state[S_LEARNED] = record + 1
        if state[S_WANTS_SLOTS] != 0:
            return i + 1          # leaves wait for slots: Python grows the tables
        if state[S_CREATED] + state[S_EVENTS] != changes or state[S_SPLITS] != splits:
            room_left = 0
            splits = state[S_SPLITS]
    return X.shape[0]


@njit
def predict_batch(t, X, rank, pred, confidence, leaf) -> None:
    """Score records without learning (the same leaf models as :func:`learn_batch`)."""
    n_classes = t.counts.shape[1]
    mc = np.zeros(n_classes)
    nb = np.zeros(n_classes)
    seen = t.state[S_CLASSES_SEEN]
    path = np.empty(t.node_i.shape[0] + 1, np.int64)
    for i in range(X.shape[0]):
        n, _, _ = route(t.node_i, t.node_f, t.child_table, t.state[S_ROOT], X[i], path)
        label, conf, _, _, _, _ = score_leaf(
            t.counts, t.node_i, t.node_f, t.gauss, t.cats, t.fmap, t.cfg_i[C_LEAF_MODEL],
            t.cfg_i[C_NB_AFTER], n, X[i], seen, rank, mc, nb)
        pred[i] = label
        confidence[i] = conf
        leaf[i] = n
