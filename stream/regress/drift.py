"""Drift at every node of the regression tree: the error the detectors watch, and the
test that swaps an alternate subtree in or drops it.

The error a node watches
    Every node on a record's path (in the main tree and in alternate subtrees alike)
    feeds its detector (:mod:`stream.tree.drift`; the feeding is written out in the record
    loop of :mod:`stream.regress.kernel`) the absolute error of the prediction of the
    leaf the record reached in that node's tree, normalised into [0, 1]:

        e = min(1, |y - y_hat| / (3 D)),

    D the target's mean absolute deviation from its mean, both faded with factor
    ``SCALE_FADING`` = 0.999 (the last thousand records or so) and taken before the
    record is learned (e = 0 for an exact prediction while D is 0, else 1).

    Why: ADWIN's false-positive and false-negative bounds (Bifet & Gavalda, SDM 2007)
    are stated for values in [0, 1], and its cut threshold eps = sqrt(2 m v ln(2 ln W / delta)) +
    2/3 ln(2 ln W / delta) m carries that range in its second term; an error in the
    target's own units would break the assumption or use a sliver of the range.
    Dividing by a spread of the target makes errors unit-free, so one delta (and one
    Page-Hinkley threshold) means the same on any target, and the clip makes the bound
    hold exactly. The mean absolute deviation, not the standard deviation, because a
    few extreme targets move it less (common practice for a robust scale). Three of
    them because a model worth keeping errs by less than the target's own spread: for
    a normal target 3 D is 2.4 standard deviations, and even the constant mean
    predictor reaches the clip on only 1.6 % of records (normal tail; measured on
    river's FriedmanDrift with the tree's own predictions: 0.02 to 0.04 %). Faded, so that a target whose
    level or spread changes for good is measured on its current spread; slowly (about
    a thousand records) compared with the few hundred records in which ADWIN reacts, so
    that a sudden rise of the errors is not hidden by a rise of the scale. The scale is
    one for the whole tree and does not depend on the model, so a node and its
    alternate are judged on the same yardstick and a worse model cannot shrink its own
    errors (as a normaliser fitted to the errors themselves would).

The swap test
    A node and its alternate are compared once both have been scored on more than
    ``swap_after`` records since their error estimates were last reset (the node's at
    its alarm, the alternate's at its start: the same records, unless the node alarmed
    again since), on the mean m and sample variance s^2 of the normalised absolute
    errors each was fed over its n records. The alternate replaces the node when

        m_node - m_alt > sqrt(2 ln(2 / alpha) (s_node^2 / n_node + s_alt^2 / n_alt)),

    and is dropped when m_alt - m_node exceeds the same bound. This is Bifet &
    Gavalda's test (IDA 2009; :func:`stream.classify.kernel.react`) with each side's
    own sample variance in place of the Bernoulli variance p (1 - p) they share: for
    0/1 errors of equal rates it is their formula exactly. Separate variances, as in
    Welch's test for two means, because a fresh alternate and an old subtree err with
    different spreads. The factor 2 ln(2 / alpha) (7.4 at alpha = 0.05) is theirs; a
    two-sided z-test (river's adaptive regression tree) would use z^2 = 3.8. The wider
    margin is kept because the errors of consecutive records at one node are not
    independent, as both tests assume, and a wrong swap throws a whole subtree away.
    Means of absolute rather than squared errors, because the detectors watch the same
    values, so the two decisions speak of one quantity.
"""

from __future__ import annotations

import math

from stream.jit import njit

from .tables import ERR_N, ERR_SQ, ERR_SUM, ES_MAD, ES_MAD_WEIGHT, ES_MEAN, ES_WEIGHT

SCALE_UNITS = 3.0
"""Mean absolute deviations of the target that make a normalised error of 1."""

SWAP, KEEP, DROP = 1, 0, -1


@njit(borrows=True)
def error_unit(err_scale) -> float:
    """The absolute error that normalises to 1 (0 while the target has shown no spread)."""
    return SCALE_UNITS * err_scale[ES_MAD]


@njit(borrows=True)
def normalised_error(err: float, unit: float) -> float:
    """``|err| / unit`` clipped at 1; while ``unit`` is 0, 0 for an exact prediction and
    1 otherwise."""
    a = abs(err)
    if unit > 0.0:
        e = a / unit
        return e if e < 1.0 else 1.0
    return 0.0 if a == 0.0 else 1.0


@njit(borrows=True)
def error_scale_update(err_scale, y: float, fading: float) -> None:
    """Add target ``y`` to the faded mean and mean absolute deviation (the deviation of
    ``y`` from the mean before it). Faded sums S <- x + a S, weights N <- 1 + a N
    (Gama, Sebastiao & Rodrigues 2013), kept as the running ratio S / N."""
    w = err_scale[ES_WEIGHT]
    if w > 0.0:
        dev = abs(y - err_scale[ES_MEAN])
        wd = fading * err_scale[ES_MAD_WEIGHT] + 1.0
        err_scale[ES_MAD_WEIGHT] = wd
        err_scale[ES_MAD] += (dev - err_scale[ES_MAD]) / wd
    w = fading * w + 1.0
    err_scale[ES_WEIGHT] = w
    err_scale[ES_MEAN] += (y - err_scale[ES_MEAN]) / w


@njit(borrows=True)
def error_mean(node_f, n: int) -> float:
    """Node ``n``'s mean normalised absolute error since its estimate was reset (0 before
    any record)."""
    count = node_f[n, ERR_N]
    return node_f[n, ERR_SUM] / count if count > 0.0 else 0.0


@njit(borrows=True)
def error_variance(node_f, n: int) -> float:
    """Sample variance of the same errors (0 below two records)."""
    count = node_f[n, ERR_N]
    if count < 2.0:
        return 0.0
    mean = node_f[n, ERR_SUM] / count
    v = (node_f[n, ERR_SQ] - count * mean * mean) / (count - 1.0)
    return v if v > 0.0 else 0.0


@njit(borrows=True)
def reset_error(node_f, n: int) -> None:
    """Start node ``n``'s error estimate afresh."""
    node_f[n, ERR_SUM] = 0.0
    node_f[n, ERR_SQ] = 0.0
    node_f[n, ERR_N] = 0.0


@njit(borrows=True)
def swap_bound(v_node: float, n_node: float, v_alt: float, n_alt: float,
               significance: float) -> float:
    """The margin sqrt(2 ln(2 / alpha) (v_node / n_node + v_alt / n_alt)) of the swap test."""
    return math.sqrt(2.0 * math.log(2.0 / significance) * (v_node / n_node + v_alt / n_alt))


@njit(borrows=True)
def swap_verdict(node_f, n: int, a: int, after: int, significance: float):
    """Compare node ``n`` with its alternate ``a``: (SWAP, KEEP or DROP, the node's mean
    normalised error, the alternate's). KEEP until both have more than ``after``
    records in their estimates."""
    n_node = node_f[n, ERR_N]
    n_alt = node_f[a, ERR_N]
    m_node = error_mean(node_f, n)
    m_alt = error_mean(node_f, a)
    if n_node <= after or n_alt <= after:
        return KEEP, m_node, m_alt
    bound = swap_bound(error_variance(node_f, n), n_node, error_variance(node_f, a), n_alt,
                       significance)
    if m_node - m_alt > bound:
        return SWAP, m_node, m_alt
    if m_alt - m_node > bound:
        return DROP, m_node, m_alt
    return KEEP, m_node, m_alt

