"""Nodes of the regression tree: their birth, statistics slots, detectors, and the life of
alternate subtrees (started, swapped in, dropped). Their death and recycling, shared with
the classifier, are in :mod:`stream.tree.kernel`.

Contents
--------
new_leaf / fresh_detector / activate / activate_if_room
    A leaf from the free-id stack (or the end of the table) with a fresh detector; a
    statistics slot given (:func:`stream.tree.kernel.deactivate` takes it back), or
    a leaf left waiting when no slot is free beyond those kept for one record.
leaf_bytes / leaf_cap / enforce_leaf_cap
    The memory budget of the active leaves' split statistics.
start_alternate / react
    What a node does with its detector's verdict (Bifet & Gavalda, IDA 2009): an alarm
    where the error rose grows an alternate beside the node (leaves included); the
    swap test of :mod:`stream.regress.drift` puts the alternate in its place or
    drops it.

All functions take the whole :class:`stream.regress.tables.RegressorTables` ``t``:
they are off the per-record path, or on it only when something changes.
"""

from __future__ import annotations

import numpy as np

from stream.jit import njit
from stream.tree.drift import (ADWIN, NO_DETECTOR, adwin_mean, adwin_reset,
                               page_hinkley_reset, page_hinkley_rose)
from stream.tree.kernel import (add_event, deactivate, kill_subtree, place_leaf,
                                slot_to_spare, swap_in_alternate, take_detector_row)

from .drift import DROP, SWAP, error_mean, reset_error, swap_verdict
from .tables import (ALT, ALT_OF, ALTERNATE, BRANCH, DEPTH, DET, ERR_LINEAR, ERR_MEAN,
                     EV_ALARM, EV_DROP, EV_START, EV_SWAP, KIND, LAST_ATTEMPT, LEAF,
                     OBSERVED, PARENT, RC_DETECTOR, RC_MAX_DEPTH, RC_SWAP_AFTER,
                     RF_MEMORY_BYTES, RF_PH_THRESHOLD, RF_SWAP_SIGNIFICANCE, S_ACTIVE,
                     S_ALARMS, S_ALTS, S_CATS_SEEN, S_DEACTIVATED, S_DROPS, S_FREE_TOP,
                     S_LEAVES, S_NODES, S_STARTS, SLOT, STATUS,
                     Y_M2)


# ---------------------------------------------------------------- leaves and slots

@njit
def new_leaf(t, parent: int, branch: int, status: int, record: int, model_from: int) -> int:
    """An inactive leaf under ``parent`` at child position ``branch``: empty statistics,
    the linear model and faded errors of node ``model_from`` (none when -1) and, when
    drift detection is on, a fresh detector. Recycled ids are used first."""
    n = place_leaf(t, parent, branch, status, record)
    t.lin_x[n] = 0.0
    if model_from >= 0:
        t.lin[n, :] = t.lin[model_from, :]
        t.node_f[n, ERR_MEAN] = t.node_f[model_from, ERR_MEAN]
        t.node_f[n, ERR_LINEAR] = t.node_f[model_from, ERR_LINEAR]
    else:
        t.lin[n, :] = 0.0
    if t.cfg_i[RC_DETECTOR] != NO_DETECTOR:
        take_detector_row(t, n)
        fresh_detector(t, n)
    return n


@njit
def fresh_detector(t, n: int) -> None:
    """Reset node ``n``'s detector and its error estimate."""
    d = t.node_i[n, DET]
    if d >= 0:
        if t.cfg_i[RC_DETECTOR] == ADWIN:
            adwin_reset(t.adwin_buckets, t.adwin_counts, t.adwin_state, d)
        else:
            page_hinkley_reset(t.ph_state, d)
    reset_error(t.node_f, n)


@njit
def activate(t, n: int) -> None:
    """Give leaf ``n`` a cleared statistics slot."""
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
def activate_if_room(t, n: int) -> None:
    """Activate leaf ``n`` if a slot is free beyond the spare ones (else it waits; see
    :func:`stream.tree.kernel.slot_to_spare`)."""
    if slot_to_spare(t.state, t.cfg_i[RC_DETECTOR] != NO_DETECTOR):
        activate(t, n)


# ---------------------------------------------------------------- memory budget

@njit
def leaf_bytes(state, n_numeric: int, n_cat: int, bins: int, buffer: int) -> float:
    """Bytes of split statistics an active leaf holds at the category counts seen so far."""
    cats = max(state[S_CATS_SEEN], 1)
    per = n_numeric * ((bins - 1) + 3 * bins + 2 * buffer + 3) + n_cat * 3 * cats
    return 8.0 * max(per, 1)


@njit
def leaf_cap(t) -> int:
    """Most leaves that may hold split statistics within the memory budget (at least one)."""
    per = leaf_bytes(t.state, t.q_stats.shape[1], t.c_stats.shape[1], t.q_stats.shape[2],
                     t.q_buf.shape[2])
    return max(1, int(t.cfg_f[RF_MEMORY_BYTES] / per))


@njit
def enforce_leaf_cap(t) -> None:
    """Keep the most promising live leaves active, at most the cap; reactivate others if
    room.

    Promise is the squared error the leaf's mean still leaves (its target M2), the
    regression analogue of the classifier's "records still misclassified". A reactivated
    leaf starts its split statistics afresh. Leaves of alternate subtrees compete alike.
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
            activate_if_room(t, n)


# ---------------------------------------------------------------- alternates

@njit
def start_alternate(t, n: int, record: int) -> int:
    """Grow a fresh alternate leaf beside node ``n``, at ``n``'s depth and branch
    position, starting from ``n``'s linear model (its target statistics and split statistics
    start empty)."""
    a = new_leaf(t, t.node_i[n, PARENT], t.node_i[n, BRANCH], ALTERNATE, record, n)
    t.node_i[a, DEPTH] = t.node_i[n, DEPTH]
    t.node_i[a, ALT_OF] = n
    t.node_i[n, ALT] = a
    activate(t, a)
    enforce_leaf_cap(t)
    t.state[S_ALTS] += 1
    t.state[S_STARTS] += 1
    add_event(t.events_i, t.events_f, t.state, EV_START, n, record, a, 0.0, 0.0)
    return a


@njit
def react(t, n: int, alarm: bool, before: float, record: int) -> int:
    """Act on node ``n``'s detector (Bifet & Gavalda 2009).

    An alarm restarts the node's error estimate and, when the error rose and no
    alternate grows there yet, starts one beside the node (as river's adaptive
    trees too: a further alarm does not restart a growing alternate). With an
    alternate, the swap test of :func:`stream.regress.drift.swap_verdict` replaces
    the node or drops the alternate. Returns the node now standing where ``n`` stood
    (``n`` itself unless an alternate was swapped in).
    """
    d = t.node_i[n, DET]
    if alarm:
        t.state[S_ALARMS] += 1
        if t.cfg_i[RC_DETECTOR] == ADWIN:
            # ADWIN has cut its window to the part after the change: compare its mean
            # with the whole window's before (Bifet & Gavalda 2009: the detector's estimate before and after the change)
            after = adwin_mean(t.adwin_state, d)
            rose = after > before
        else:
            after = error_mean(t.node_f, n)
            rose = page_hinkley_rose(t.ph_state, d, t.cfg_f[RF_PH_THRESHOLD])
        add_event(t.events_i, t.events_f, t.state, EV_ALARM, n, record, -1, before, after)
        # the estimate restarts on any alarm, so that a node and the alternate started
        # now are compared on the same records
        reset_error(t.node_f, n)
        if rose and t.node_i[n, ALT] < 0:
            start_alternate(t, n, record)
        return n
    a = t.node_i[n, ALT]
    if a < 0:
        return n
    verdict, m_node, m_alt = swap_verdict(t.node_f, n, a, t.cfg_i[RC_SWAP_AFTER],
                                          t.cfg_f[RF_SWAP_SIGNIFICANCE])
    if verdict == SWAP:
        add_event(t.events_i, t.events_f, t.state, EV_SWAP, n, record, a, m_node, m_alt)
        return swap_in_alternate(t, n, record)
    if verdict == DROP:
        add_event(t.events_i, t.events_f, t.state, EV_DROP, n, record, a, m_node, m_alt)
        t.node_i[n, ALT] = -1
        t.state[S_ALTS] -= 1
        t.state[S_DROPS] += 1
        kill_subtree(t, a)
    return n
