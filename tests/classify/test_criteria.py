"""Split criteria and the Hoeffding bound (stream/classify/criteria.py, stream/tree/bound.py) against published values and
reference libraries.

Sources: the bound eps = sqrt(R^2 ln(1/delta) / (2 n)) (Hoeffding, JASA 1963; as used by
Domingos & Hulten, KDD 2000) and the check values computed for it in
tests/README.md; Shannon entropy in bits from scipy.stats.entropy(base=2);
node impurities of scikit-learn's DecisionTreeClassifier (criterion "entropy" is in bits,
"gini" is 1 - sum p^2); split merits and the minimum-branch-fraction rule of river 0.26.1's
InfoGainSplitCriterion / GiniSplitCriterion.

Every call into sapwood runs under ``np.errstate(all="raise")``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings, strategies as st
from river.tree.split_criterion import GiniSplitCriterion, InfoGainSplitCriterion
from scipy.stats import entropy as scipy_entropy
from sklearn.tree import DecisionTreeClassifier

from stream.classify.criteria import (GINI, INFO_GAIN, criterion_range, gini_impurity,
                                      split_merit)
from stream.classify.settings import CRITERIA
from stream.tree.bound import hoeffding_bound

DELTA = 1e-7   # published default (Domingos & Hulten, KDD 2000)
TAU = 0.05     # published default tie threshold


@pytest.fixture(autouse=True)
def _raise_on_float_errors():
    with np.errstate(all="raise"):
        yield


def test_criterion_ids_match_the_settings_registry():
    assert CRITERIA == {"info_gain": INFO_GAIN, "gini": GINI}


# ---------------------------------------------------------------- Hoeffding bound

# Check values computed from the formula (tests/README.md; delta = 1e-7, R = log2 C bits):
# (C, eps at n=200, eps at n=1000, n beyond which eps < tau = 0.05).
BOUND_VALUES = [(2, 0.20074, 0.08977, 3223.6),
                (3, 0.31816, 0.14229, 8098.1),
                (10, 0.66683, 0.29822, 35573.3)]


@pytest.mark.parametrize("classes, eps200, eps1000, tie_n", BOUND_VALUES)
def test_hoeffding_bound_check_values(classes, eps200, eps1000, tie_n):
    # source: Hoeffding 1963 / Domingos & Hulten 2000, values in tests/README.md
    r = criterion_range(INFO_GAIN, classes)
    assert r == pytest.approx(math.log2(classes), abs=1e-15)
    assert hoeffding_bound(r, DELTA, 200.0) == pytest.approx(eps200, abs=5e-6)
    assert hoeffding_bound(r, DELTA, 1000.0) == pytest.approx(eps1000, abs=5e-6)
    # the tie rule (eps < tau) first holds just above tie_n records
    first = math.floor(tie_n)
    assert hoeffding_bound(r, DELTA, float(first)) >= TAU
    assert hoeffding_bound(r, DELTA, float(first + 1)) < TAU
    # and tie_n itself is R^2 ln(1/delta) / (2 tau^2), solved from the formula
    assert r * r * math.log(1 / DELTA) / (2 * TAU * TAU) == pytest.approx(tie_n, abs=0.05)


def test_gini_range_is_one_for_any_number_of_classes():
    # source: Domingos & Hulten 2000 (R is the range of the merit; Gini lies in [0, 1))
    for classes in range(1, 12):
        assert criterion_range(GINI, classes) == 1.0
    # with R = 1 the Gini bound equals the two-class information-gain bound
    assert hoeffding_bound(criterion_range(GINI, 7), DELTA, 200.0) == pytest.approx(0.20074,
                                                                                  abs=5e-6)


def test_information_gain_range_never_below_one_bit():
    # a leaf holding one class still has the two-class range (river 0.26.1 does the same:
    # InfoGainSplitCriterion.range_of_merit uses max(C, 2))
    assert criterion_range(INFO_GAIN, 1) == 1.0
    assert criterion_range(INFO_GAIN, 0) == 1.0
    for classes in range(1, 12):
        assert criterion_range(INFO_GAIN, classes) == InfoGainSplitCriterion.range_of_merit(
            dict.fromkeys(range(classes), 1.0))


@settings(max_examples=200, deadline=None)
@given(r=st.floats(0.01, 10.0), delta=st.floats(1e-12, 0.5), n=st.floats(1.0, 1e9))
def test_hoeffding_bound_is_the_published_formula(r, delta, n):
    # source: Hoeffding 1963, eps = sqrt(R^2 ln(1/delta) / (2 n))
    expected = math.sqrt(r * r * math.log(1.0 / delta) / (2.0 * n))
    assert hoeffding_bound(r, delta, n) == pytest.approx(expected, rel=1e-12)


def test_hoeffding_bound_shrinks_as_one_over_root_n():
    # source: the formula; quadrupling n halves eps
    for n in (10.0, 200.0, 5000.0):
        assert hoeffding_bound(1.0, DELTA, 4 * n) == pytest.approx(
            hoeffding_bound(1.0, DELTA, n) / 2, rel=1e-12)


# ---------------------------------------------------------------- merits

def _post(rows) -> np.ndarray:
    return np.asarray(rows, dtype=np.float64)


def _info_gain_scipy(post: np.ndarray) -> float:
    """Information gain in bits from scipy.stats.entropy (the reference)."""
    weights = post.sum(axis=1)
    pre = post.sum(axis=0)
    after = sum(w / weights.sum() * scipy_entropy(row, base=2)
                for w, row in zip(weights, post) if w > 0)
    return float(scipy_entropy(pre, base=2) - after)


def _river_dists(post: np.ndarray) -> list[dict]:
    return [{k: float(v) for k, v in enumerate(row)} for row in post]


@st.composite
def _branch_counts(draw) -> np.ndarray:
    """Class counts per branch: 2-5 branches x 2-5 classes, at least two branches non-empty."""
    branches = draw(st.integers(2, 5))
    classes = draw(st.integers(2, 5))
    rows = draw(st.lists(st.lists(st.integers(0, 60), min_size=classes, max_size=classes),
                         min_size=branches, max_size=branches))
    post = _post(rows)
    assume((post.sum(axis=1) > 0).sum() >= 2)
    return post


@settings(max_examples=200, deadline=None)
@given(post=_branch_counts())
def test_information_gain_against_scipy_entropy(post):
    # source: scipy.stats.entropy(base=2); merit = H(pre) - sum_b w_b/W H(post_b)
    merit = split_merit(INFO_GAIN, post.sum(axis=0), post, post.shape[0], 0.0)
    assert merit == pytest.approx(_info_gain_scipy(post), abs=1e-12)
    # river 0.26.1 computes the same merit
    river = InfoGainSplitCriterion(0.0).merit_of_split(
        {k: float(v) for k, v in enumerate(post.sum(axis=0))}, _river_dists(post))
    assert merit == pytest.approx(river, abs=1e-12)


@settings(max_examples=200, deadline=None)
@given(post=_branch_counts())
def test_gini_gain_against_river(post):
    # source: river 0.26.1 GiniSplitCriterion.merit_of_split returns 1 - sum_b w_b/W G(post_b);
    # sapwood's Gini gain is G(pre) - sum_b w_b/W G(post_b). They differ by the constant
    # 1 - G(pre) per leaf, so both rank the candidates of a leaf identically.
    pre = post.sum(axis=0)
    merit = split_merit(GINI, pre, post, post.shape[0], 0.0)
    river = GiniSplitCriterion(0.0).merit_of_split(
        {k: float(v) for k, v in enumerate(pre)}, _river_dists(post))
    p = pre / pre.sum()
    assert merit == pytest.approx(river - 1.0 + (1.0 - (p * p).sum()), abs=1e-12)


def test_gini_hand_worked_example_and_sklearn():
    # Hand-worked (common practice, Gini = 1 - sum p^2):
    #   pre [6, 4]:        G = 1 - 0.36 - 0.16              = 0.48
    #   left [5, 1] (6):   G = 1 - (25 + 1) / 36            = 10/36
    #   right [1, 3] (4):  G = 1 - (1 + 9) / 16             = 6/16
    #   gain = 0.48 - (0.6 * 10/36 + 0.4 * 6/16) = 0.48 - 0.316667 = 49/300
    post = _post([[5, 1], [1, 3]])
    pre = post.sum(axis=0)
    assert gini_impurity(pre, pre.sum()) == pytest.approx(0.48, abs=1e-15)
    assert split_merit(GINI, pre, post, 2, 0.01) == pytest.approx(49 / 300, abs=1e-15)
    # source: scikit-learn's node impurities for a stump on the same ten records
    X = np.array([0] * 6 + [1] * 4, dtype=float)[:, None]
    y = np.array([0] * 5 + [1] + [0] + [1] * 3)
    for criterion, ours in (("gini", GINI), ("entropy", INFO_GAIN)):
        tree = DecisionTreeClassifier(criterion=criterion, max_depth=1).fit(X, y).tree_
        imp, n = tree.impurity, tree.weighted_n_node_samples
        sklearn_gain = imp[0] - (n[1] * imp[1] + n[2] * imp[2]) / n[0]
        assert split_merit(ours, pre, post, 2, 0.01) == pytest.approx(sklearn_gain, abs=1e-12)


def test_only_the_first_rows_of_post_count():
    # the kernels reuse one post buffer sized for the widest split; rows beyond
    # n_branches hold stale values and must not matter
    post = _post([[5, 1], [1, 3], [100, 0], [0, 100]])
    assert split_merit(INFO_GAIN, post[:2].sum(axis=0), post, 2, 0.01) == pytest.approx(
        _info_gain_scipy(post[:2]), abs=1e-12)


# ---------------------------------------------------------------- minimum branch fraction

@pytest.mark.parametrize("criterion", [INFO_GAIN, GINI])
@pytest.mark.parametrize("rows, fraction", [
    ([[99.5, 0.0], [0.0, 0.5]], 0.01),     # second branch holds 0.5 % < 1 %
    ([[99.0, 0.0], [0.0, 1.0]], 0.01),     # exactly 1 %: "more than" is strict
    ([[10.0, 10.0], [0.0, 0.0]], 0.0),     # one empty branch
    ([[60.0, 30.0], [5.0, 5.0], [0.0, 0.0]], 0.2),  # only one of three above 20 %
    ([[0.0, 0.0], [0.0, 0.0]], 0.0),       # no weight at all
])
def test_too_few_branches_above_the_fraction_give_minus_infinity(criterion, rows, fraction):
    # source: river 0.26.1 split criteria return -inf unless at least two branches hold
    # strictly more than min_branch_fraction of the weight (num_subsets_greater_than_frac)
    post = _post(rows)
    pre = post.sum(axis=0)
    assert split_merit(criterion, pre, post, post.shape[0], fraction) == -math.inf
    reference = (InfoGainSplitCriterion if criterion == INFO_GAIN else GiniSplitCriterion)(
        fraction).merit_of_split({k: float(v) for k, v in enumerate(pre)}, _river_dists(post))
    assert reference == -math.inf


@pytest.mark.parametrize("criterion", [INFO_GAIN, GINI])
def test_two_branches_just_above_the_fraction_give_a_finite_merit(criterion):
    post = _post([[98.9, 0.0], [0.0, 1.1]])   # 1.1 % > 1 %
    merit = split_merit(criterion, post.sum(axis=0), post, 2, 0.01)
    assert math.isfinite(merit) and merit > 0.0
