"""The Hoeffding tree classifier (stream/classifier.py and its kernels) against the outside.

Sources named beside each check:

* river 0.26.1 ``tree.HoeffdingTreeClassifier`` (the reference learner) on river's own
  synthetic generators (SEA: Street & Kim, KDD 2001; Agrawal: Agrawal, Imielinski & Swami,
  1993; LED: Breiman et al. 1984) and on the real datasets that ship inside the river
  package (no download);
* scikit-learn's batch ``DecisionTreeClassifier`` for the root split on a stationary stream;
* the Bayes-optimal accuracy of the LED problem, computed here from the seven-segment
  patterns and checked against the 74 % published by Breiman et al. (CART book, 1984);
* the memory management of Domingos & Hulten (KDD 2000): least promising leaves, promise
  = records x error, deactivated first; river's ``calculate_promise`` is the same formula;
* scipy.stats.lognorm for the true cut of a skewed feature.

Every call into sapwood runs under ``np.errstate(all="raise")``. Records are generated
with fixed seeds. Measured values quoted in comments come from this machine.
"""

from __future__ import annotations

import collections
import dataclasses
import functools
import itertools
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st
from river import datasets as river_datasets
from river import tree as river_tree
from river.datasets import synth
from river.tree.nodes.branch import (NominalBinaryBranch, NominalMultiwayBranch,
                                     NumericBinaryBranch)
from river.tree.nodes.htc_nodes import LeafMajorityClass
from scipy import stats as scipy_stats
from sklearn.tree import DecisionTreeClassifier

from stream.classify.kernel import leaf_bytes, leaf_cap
from stream.classify.model import Scored, TreeClassifier
from stream.classify.settings import TreeSettings
from stream.classify.tables import (CHILD_START, CREATED, EQUALS, FEATURE, H_NBUF, H_NEDGES,
                                    H_READY, KIND, LEAF, MULTIWAY, N_CHILDREN, NUMERIC,
                                    PARENT, S_ACTIVE, S_CATS_SEEN, S_CLASSES_SEEN,
                                    S_DEACTIVATED, S_LEARNED, S_LEAVES, S_NODES, S_PRUNED,
                                    S_SPLITS, SLOT, THRESHOLD, WEIGHT)
from stream.tree.settings import DETECTORS

AGRAWAL_NOMINAL = ("elevel", "car", "zipcode")   # river's Agrawal docs treat these as nominal

_SETTING_NAMES = {f.name for f in dataclasses.fields(TreeSettings)}
# river's HoeffdingTreeClassifier has no drift handling. Where sapwood's settings offer
# drift detectors, the comparisons with it switch them off (a plain Hoeffding tree); the
# product defaults are checked as such in test_bundled_datasets_default_accuracy_at_least_rivers
# and the LED test.
PLAIN = {"detector": "off"} if "detector" in _SETTING_NAMES else {}


def _settings(**settings) -> TreeSettings:
    """A plain Hoeffding tree with the given settings."""
    return TreeSettings(**{**PLAIN, **settings})


# ---------------------------------------------------------------- streams

Stream = collections.namedtuple("Stream", "rows keys names X y classes")


def _arrays(pairs) -> Stream:
    """River (x, y) pairs -> sapwood arrays: X float64, y codes in first-seen label order."""
    rows = list(pairs)
    keys = list(rows[0][0])
    X = np.array([[x[k] for k in keys] for x, _ in rows], dtype=np.float64)
    labels = [str(label) for _, label in rows]
    classes = list(dict.fromkeys(labels))
    code = {c: k for k, c in enumerate(classes)}
    y = np.array([code[label] for label in labels], dtype=np.int32)
    return Stream(rows, keys, [str(k) for k in keys], X, y, classes)


def _reorder(s: Stream, order: np.ndarray) -> Stream:
    """The same records in another order (class codes re-derived in first-seen order)."""
    return _arrays([s.rows[i] for i in order])


@functools.lru_cache(maxsize=None)
def _synthetic(name: str, n: int, **params) -> Stream:
    """A cached prefix of a river generator; callers must not modify the arrays."""
    generator = {"sea": synth.SEA, "agrawal": synth.Agrawal, "led": synth.LED}[name](**params)
    return _arrays(generator.take(n))


@functools.lru_cache(maxsize=None)
def _bundled(name: str) -> Stream:
    return _arrays(iter(getattr(river_datasets, name)()))


def _kinds(s: Stream, nominal=()) -> list[str]:
    return ["category" if k in nominal else "numeric" for k in s.keys]


def _learn(model: TreeClassifier, X, y, classes) -> Scored:
    with np.errstate(all="raise"):
        return model.learn(X, y, classes)


def _sapwood(s: Stream, nominal=(), plain: bool = True,
             **settings) -> tuple[TreeClassifier, Scored]:
    config = _settings(**settings) if plain else TreeSettings(**settings)
    model = TreeClassifier(s.names, _kinds(s, nominal), config)
    return model, _learn(model, s.X, s.y, s.classes)


def _river(s: Stream, model) -> np.ndarray:
    """Prequential (test-then-train) predictions of a river classifier, as class codes."""
    code = {c: k for k, c in enumerate(s.classes)}
    out = np.empty(len(s.rows), np.int32)
    for i, (x, label) in enumerate(s.rows):
        guess = model.predict_one(x)
        out[i] = -1 if guess is None else code[str(guess)]
        model.learn_one(x, label)
    return out


# ---------------------------------------------------------------- tree walks

def _river_shape(node):
    """river's tree as nested tuples: ("<=", feature, threshold, children), ("==", feature,
    value, children), ("in", feature, {value: child}), or ("leaf",)."""
    if isinstance(node, NumericBinaryBranch):
        return ("<=", node.feature, node.threshold, [_river_shape(c) for c in node.children])
    if isinstance(node, NominalBinaryBranch):
        return ("==", node.feature, node.value, [_river_shape(c) for c in node.children])
    if isinstance(node, NominalMultiwayBranch):
        # _mapping (value -> child index) is river's private routing table
        return ("in", node.feature,
                {v: _river_shape(node.children[i]) for v, i in node._mapping.items()})
    return ("leaf",)


def _sapwood_shape(model: TreeClassifier, keys: list, n: int = 0):
    """sapwood's tree in the same nested form, read from the node tables (stream/tables.py)."""
    t = model.tables_
    kind = t.node_i[n, KIND]
    if kind == LEAF:
        return ("leaf",)
    feature = keys[t.node_i[n, FEATURE]]
    start = t.node_i[n, CHILD_START]
    kids = t.child_table[start:start + t.node_i[n, N_CHILDREN]]
    if kind == NUMERIC:
        return ("<=", feature, float(t.node_f[n, THRESHOLD]),
                [_sapwood_shape(model, keys, c) for c in kids[:2]])
    if kind == EQUALS:
        return ("==", feature, int(t.node_f[n, THRESHOLD]),
                [_sapwood_shape(model, keys, c) for c in kids[:2]])
    assert kind == MULTIWAY
    return ("in", feature, {code: _sapwood_shape(model, keys, c)
                            for code, c in enumerate(kids) if c >= 0})


def _assert_same_tree(ours, theirs, path="root") -> tuple[int, float]:
    """Assert equal structure; thresholds within 1e-6. Returns (branches, max |dthreshold|)."""
    assert ours[0] == theirs[0], f"{path}: node kind {ours[0]!r} vs river {theirs[0]!r}"
    if ours[0] == "leaf":
        return 0, 0.0
    assert ours[1] == theirs[1], f"{path}: split feature {ours[1]!r} vs river {theirs[1]!r}"
    branches, worst = 1, 0.0
    if ours[0] == "in":
        assert set(ours[2]) == set(theirs[2]), f"{path}: branch values differ"
        pairs = [(ours[2][v], theirs[2][v], f"{path}/{ours[1]}={v}") for v in sorted(ours[2])]
    else:
        if ours[0] == "<=":
            worst = abs(ours[2] - theirs[2])
            assert worst <= 1e-6, f"{path}: threshold {ours[2]} vs river {theirs[2]}"
        else:
            assert ours[2] == theirs[2], f"{path}: value {ours[2]} vs river {theirs[2]}"
        pairs = [(a, b, f"{path}/{ours[1]}{side}") for a, b, side in
                 zip(ours[3], theirs[3], ("L", "R"))]
        assert len(ours[3]) == len(theirs[3]) == 2
    for a, b, where in pairs:
        n, w = _assert_same_tree(a, b, where)
        branches += n
        worst = max(worst, w)
    return branches, worst


# ================================================================ a. exactness against river

# Why the two learners can agree record for record: with majority-class leaves both run the
# same algorithm (Domingos & Hulten 2000, with the refinements of Kirkby 2007, PhD thesis, University of Waikato): per-class Gaussian
# estimators with 10 evenly spaced candidates between the observed min and max, merit of
# the best candidate per feature plus the null split (merit -inf), the bound with R =
# log2(C), split when best - second > eps or eps < tau, min branch fraction 0.01, no split
# attempt above a 99 % majority, children seeded with the estimated class weights.
# What would make a principled difference (none of it is triggered by these streams):
# * ties among equal class weights: sapwood breaks them by the label's string order, river
#   by the sorted order of the label objects (predict_proba_one starts from
#   sorted(self.classes)); the two agree for booleans and the digits 0-9, not for integer
#   labels >= 10 ("10" < "9" as strings);
# * the range R for information gain: sapwood counts the classes with non-zero weight at
#   the leaf, river counts the keys of the leaf's class dictionary, which can hold zero
#   weights inherited from a Gaussian split estimate; for two classes both use R = 1;
# * river's merit for Gini is 1 - weighted child impurity, sapwood's is the Gini gain;
#   they differ by a constant per leaf, so candidates rank the same (tests/classify/test_criteria.py);
# * river's memory management (measured object sizes every million records) versus
#   sapwood's cap on active leaves; river's is never reached at these sizes.
EXACT_CASES = [
    # (generator, params, records, nominal features, criterion)
    ("sea", dict(variant=0, noise=0.1, seed=7), 60_000, (), "info_gain"),
    ("sea", dict(variant=0, noise=0.1, seed=7), 60_000, (), "gini"),
    ("agrawal", dict(classification_function=1, seed=3), 50_000, (), "info_gain"),
    ("agrawal", dict(classification_function=5, seed=3), 50_000, (), "info_gain"),
    ("agrawal", dict(classification_function=8, seed=3), 50_000, (), "gini"),
    ("agrawal", dict(classification_function=2, seed=3), 50_000, AGRAWAL_NOMINAL, "info_gain"),
    ("agrawal", dict(classification_function=3, seed=3), 50_000, AGRAWAL_NOMINAL, "info_gain"),
]


@pytest.mark.parametrize("name, params, n, nominal, criterion", EXACT_CASES,
                         ids=lambda v: str(v) if not isinstance(v, dict) else
                         "-".join(f"{k}{w}" for k, w in v.items()))
def test_majority_leaves_agree_with_river_record_for_record(name, params, n, nominal,
                                                             criterion):
    # source: river 0.26.1 HoeffdingTreeClassifier(leaf_prediction="mc"), defaults otherwise
    # (grace 200, delta 1e-7, tau 0.05, GaussianSplitter(n_splits=10)); measured: 0 differing
    # predictions on every case; thresholds equal to the last bit; e.g. SEA 60k: 49 nodes,
    # accuracy 0.8398 both (Agrawal f1: 63 nodes, 0.7960).
    s = _synthetic(name, n, **params)
    model, ours = _sapwood(s, nominal, leaf_model="majority", criterion=criterion)
    reference = river_tree.HoeffdingTreeClassifier(
        leaf_prediction="mc", split_criterion=criterion,
        nominal_attributes=list(nominal) or None)
    theirs = _river(s, reference)

    differing = np.flatnonzero(ours.pred != theirs)
    assert differing.size == 0, f"{differing.size} predictions differ, first at {differing[:5]}"
    assert model.n_nodes == reference.n_nodes
    assert model.n_nodes > 5, "the stream must grow a real tree for this check to mean much"
    branches, worst = _assert_same_tree(_sapwood_shape(model, s.keys),
                                        _river_shape(reference._root))
    assert branches == model.n_nodes - model.n_leaves
    assert worst <= 1e-6
    assert abs(np.mean(ours.pred == s.y) - np.mean(theirs == s.y)) <= 1e-3


@pytest.mark.parametrize("leaf_model, river_leaf", [("naive_bayes", "nb"), ("adaptive", "nba")])
def test_bayes_leaves_agree_with_river_on_numeric_features(leaf_model, river_leaf):
    # source: river 0.26.1 leaf_prediction "nb" / "nba" on SEA(0, noise 0.1). Leaf models
    # do not change the splits, so the trees are the same. Predictions differ on purpose
    # where a class present at a leaf has no spread on a feature yet: river then leaves
    # that class's density out (a density of 1, which lets it win for lack of evidence);
    # sapwood uses the leaf's pooled variance (splits.gaussian_fallback_density).
    # Measured: 1.0 % (nb) and 0.5 % (nba) of predictions differ; accuracy 0.8718 vs
    # 0.8645 (nb) and 0.8715 vs 0.8695 (nba), sapwood first.
    s = _synthetic("sea", 20_000, variant=0, noise=0.1, seed=7)
    model, ours = _sapwood(s, leaf_model=leaf_model)
    reference = river_tree.HoeffdingTreeClassifier(leaf_prediction=river_leaf)
    theirs = _river(s, reference)
    assert model.n_nodes == reference.n_nodes
    assert np.mean(ours.pred != theirs) < 0.02
    assert np.mean(ours.pred == s.y) >= np.mean(theirs == s.y) - 1e-3


# ================================================================ b. root split vs sklearn

def _root_split(model: TreeClassifier) -> tuple[int, float, int]:
    """(feature, threshold, records the root had learned when it split)."""
    t = model.tables_
    assert t.node_i[0, KIND] == NUMERIC, "the root never split"
    first_child = t.child_table[t.node_i[0, CHILD_START]]
    return int(t.node_i[0, FEATURE]), float(t.node_f[0, THRESHOLD]), int(t.node_i[first_child,
                                                                                 CREATED])


# Agrawal functions 1 and 7 have one clearly best first cut on a continuous feature (salary);
# functions 0 (age < 40 or >= 60: two equally good cuts) and SEA (x0 and x1 symmetric) are
# left out because the batch optimum itself is a coin toss there.
@pytest.mark.parametrize("function", [1, 7])
@pytest.mark.parametrize("splits", ["gaussian", "histogram"])
@pytest.mark.parametrize("criterion", ["info_gain", "gini"])
def test_root_split_matches_sklearn_on_a_stationary_stream(function, splits, criterion):
    # source: scikit-learn DecisionTreeClassifier(max_depth=1) fitted on the records the root
    # had seen when it split. Tolerance: the Gaussian split statistic chooses among 10 evenly spaced
    # candidates, so it can miss the batch optimum by up to one spacing (max - min) / 11;
    # the histogram's 32 quantile bins are narrower than that on these uniform features.
    # Measured |d threshold| / spacing at seed 11: Gaussian 0.06-0.36, histogram 0.00-0.46
    # (info gain over seeds 1-8: Gaussian 0.10-0.12, histogram 0.01-0.28).
    s = _synthetic("agrawal", 10_000, classification_function=function, seed=11)
    model, _ = _sapwood(s, numeric_splits=splits, criterion=criterion)
    feature, threshold, seen = _root_split(model)
    sk = DecisionTreeClassifier(criterion="entropy" if criterion == "info_gain" else "gini",
                                max_depth=1).fit(s.X[:seen], s.y[:seen])
    assert s.names[feature] == s.names[sk.tree_.feature[0]]
    column = s.X[:seen, feature]
    spacing = (column.max() - column.min()) / 11
    assert abs(threshold - sk.tree_.threshold[0]) <= spacing, (
        f"threshold {threshold:.1f} vs sklearn {sk.tree_.threshold[0]:.1f}, spacing {spacing:.1f}")
    # on a stationary stream the batch tree on everything agrees on the feature too
    whole = DecisionTreeClassifier(criterion="entropy", max_depth=1).fit(s.X, s.y)
    assert whole.tree_.feature[0] == feature


@pytest.mark.parametrize("splits", ["gaussian", "histogram"])
def test_root_split_matches_sklearn_on_phishing(splits):
    # source: river's bundled Phishing data (1250 rows) and scikit-learn's stump on the
    # records the root had seen. The winning feature takes the values {0, 0.5, 1}, where any
    # threshold between two values is the same test, so the check is that the two thresholds
    # send the same records left (measured: sapwood 0.545 / 0.5, sklearn 0.75).
    s = _bundled("Phishing")
    model, _ = _sapwood(s, numeric_splits=splits)
    feature, threshold, seen = _root_split(model)
    sk = DecisionTreeClassifier(criterion="entropy", max_depth=1).fit(s.X[:seen], s.y[:seen])
    assert feature == sk.tree_.feature[0]
    assert np.array_equal(s.X[:seen, feature] <= threshold,
                          s.X[:seen, feature] <= sk.tree_.threshold[0])


# ================================================================ c. LED, Bayes-optimal rate

# Seven-segment digits (common practice), segments in the order river's LED generator and
# the UCI LED program use: top, upper left, upper right, middle, lower left, lower right,
# bottom.
_SEGMENTS = "t ul ur m ll lr b".split()
_DIGIT_SEGMENTS = ["t ul ur ll lr b", "ur lr", "t ur m ll b", "t ur m lr b", "ul ur m lr",
                   "t ul m lr b", "t ul m ll lr b", "t ur lr", "t ul ur m ll lr b",
                   "t ul ur m lr b"]
LED_PATTERNS = np.array([[int(seg in d.split()) for seg in _SEGMENTS] for d in _DIGIT_SEGMENTS])


def led_bayes_accuracy(flip: float) -> float:
    """Accuracy of the Bayes-optimal LED classifier when each of the 7 segments is flipped
    independently with probability ``flip`` and the 10 digits are equally likely.

    Irrelevant extra features are independent of the digit and do not change the bound.
    """
    shown = np.array(list(itertools.product((0, 1), repeat=7)))
    distance = (shown[:, None, :] != LED_PATTERNS[None, :, :]).sum(axis=2)
    likelihood = flip ** distance * (1.0 - flip) ** (7 - distance)
    return float(likelihood.max(axis=1).sum() / 10.0)


def test_led_bayes_rate_reproduces_the_published_value():
    # source: Breiman et al. 1984 (CART book, pp. 43-49): 74 % at 10 % segment noise
    assert led_bayes_accuracy(0.10) == pytest.approx(0.74, abs=0.0005)
    # tests/README.md: computed 0.7648 for river's effective flip rate 0.09
    assert led_bayes_accuracy(0.09) == pytest.approx(0.7648, abs=0.00005)


def _led_digits(s: Stream) -> np.ndarray:
    return np.array([int(s.classes[k]) for k in s.y])


def test_river_led_uses_these_patterns_and_flips_with_noise_minus_one_percent():
    # source: river 0.26.1 LED; without noise the first 7 features are the patterns exactly
    clean = _synthetic("led", 2_000, seed=1, noise_percentage=0.0, irrelevant_features=True)
    assert np.array_equal(clean.X[:, :7], LED_PATTERNS[_led_digits(clean)])
    # with noise_percentage=0.1 a segment flips when 0.01 + U(0,1) <= 0.1, i.e. with
    # probability 0.09 (tests/README.md); measured over 50k x 7 segments
    noisy = _synthetic("led", 50_000, seed=1, noise_percentage=0.1, irrelevant_features=True)
    flips = noisy.X[:, :7] != LED_PATTERNS[_led_digits(noisy)]
    se = math.sqrt(0.09 * 0.91 / flips.size)
    assert abs(flips.mean() - 0.09) <= 3 * se, f"flip rate {flips.mean():.5f}"
    shares = np.bincount(_led_digits(noisy), minlength=10) / len(noisy.y)
    assert np.all(np.abs(shares - 0.1) <= 0.01)   # digits equally likely


@pytest.mark.parametrize("kind", ["category", "numeric"])
def test_led_accuracy_approaches_but_does_not_exceed_the_bayes_rate(kind):
    # source: Bayes-optimal accuracy computed above for river's flip rate 0.09 (0.7648).
    # Margin: each prequential prediction is fixed before its record's label is seen and the
    # records are i.i.d., so the number right is dominated by Binomial(n, bound); three
    # standard errors (0.0057 at 50k) give a one-sided false-alarm rate of about 0.1 %.
    s = _synthetic("led", 50_000, seed=1, noise_percentage=0.1, irrelevant_features=True)
    bound = led_bayes_accuracy(0.09)
    model = TreeClassifier(s.names, [kind] * len(s.names))    # default: adaptive leaves
    right = _learn(model, s.X, s.y, s.classes).pred == s.y
    se = math.sqrt(bound * (1 - bound) / right.size)
    assert right.mean() <= bound + 3 * se, f"accuracy {right.mean():.4f} above {bound:.4f}"
    if kind == "category":
        # segments are on/off indicators, so category is their faithful kind. Measured over
        # seeds 1-8: 0.759-0.765 overall, 0.756-0.765 on the second half (bound 0.7648).
        assert right.mean() >= bound - 0.01, f"accuracy {right.mean():.4f}"
        assert right[25_000:].mean() >= bound - 0.01, f"2nd half {right[25_000:].mean():.4f}"
    # As numeric features the 0/1 segments feed Gaussian naive Bayes, and accuracy falls
    # after the first split (seed 1: 0.748 overall, 0.737 on the second half; seed 2: 0.711,
    # 0.659). river's "nb" leaves do exactly the same (0 differing predictions on seed 2,
    # measured): a class whose weight a child inherited from the split estimate but which
    # the child has not observed yet gets log-density 0 ("undefined") for every feature and
    # outvotes the observed classes. Only the upper bound is asserted for that kind.


# ================================================================ d. river's bundled data

@pytest.mark.parametrize("name", ["Phishing", "Bananas", "ImageSegments", "Shuttle"])
def test_bundled_datasets_default_accuracy_at_least_rivers(name):
    # source: the classification datasets shipped inside river 0.26.1 (no download; Elec2,
    # Higgs etc. download and are left out; Yeast is multi-label). All features numeric.
    # Measured prequential accuracy, sapwood default vs river default (nba leaves):
    # Phishing 0.8792 / 0.8792, Bananas 0.6430 / 0.6430, ImageSegments 0.7784 / 0.7779,
    # Shuttle 0.9946 / 0.9946.
    # The same holds for sapwood's plain Hoeffding tree and for its product defaults
    # (which may add drift handling).
    s = _bundled(name)
    theirs = np.mean(_river(s, river_tree.HoeffdingTreeClassifier()) == s.y)
    for plain in (True, False):
        _, ours = _sapwood(s, plain=plain)
        ours_acc = np.mean(ours.pred == s.y)
        assert ours_acc >= theirs - 0.01, f"{name}, plain={plain}: {ours_acc:.4f} vs {theirs:.4f}"


# ================================================================ e. batch-size independence

def _logical_tables(model: TreeClassifier) -> dict:
    """Everything a model is, without the capacities: array shapes, child-block widths and
    their offsets in child_table depend on when tables were grown, which depends on batch
    boundaries, and are not part of the learned state."""
    t = model.tables_
    n, c, k = model.n_nodes, len(model.classes_), int(t.state[S_CATS_SEEN])
    out = {"node_i": np.delete(t.node_i[:n], [CHILD_START, N_CHILDREN], axis=1),
           "node_f": t.node_f[:n], "counts": t.counts[:n, :c], "fmap": t.fmap,
           "state": t.state[[S_NODES, S_ACTIVE, S_LEARNED, S_CLASSES_SEEN, S_CATS_SEEN,
                             S_SPLITS, S_PRUNED, S_DEACTIVATED, S_LEAVES]]}
    for i in range(n):
        start = t.node_i[i, CHILD_START]
        kids = t.child_table[start:start + t.node_i[i, N_CHILDREN]]
        out[f"children {i}"] = np.array([(code, kid) for code, kid in enumerate(kids) if kid >= 0])
        s = t.node_i[i, SLOT]
        if s < 0:
            continue
        out[f"gauss {i}"] = t.gauss[s, :, :c]
        out[f"cats {i}"] = t.cats[s, :, :c, :k + 1]
        if t.hist_meta.shape[0]:
            meta = t.hist_meta[s]
            out[f"hist_meta {i}"] = meta
            for j, m in enumerate(meta):
                if m[H_READY]:
                    out[f"edges {i} {j}"] = t.hist_edges[s, j, :m[H_NEDGES]]
                    out[f"hist {i} {j}"] = t.hist_counts[s, j, :, :c]
                out[f"buffer {i} {j}"] = t.hist_buf[s, j, :m[H_NBUF]]
    return out


def _assert_same_model(a: TreeClassifier, b: TreeClassifier) -> None:
    ta, tb = _logical_tables(a), _logical_tables(b)
    assert ta.keys() == tb.keys()
    for key in ta:
        assert np.array_equal(ta[key], tb[key], equal_nan=True), f"{key} differs"
    assert a.classes_ == b.classes_


MIXED_N = 3_500
# a short grace period and a generous tie threshold make the 10-class LED tree split within
# these few records, so batches are cut across splits, grown tables and a new class
MIXED_SETTINGS = dict(grace_period=100, tie_threshold=0.25)


@functools.lru_cache(maxsize=None)
def _mixed_stream(which: str) -> tuple[Stream, list[str], np.ndarray]:
    """A river stream with categorical features, ~5 % missing values (seeded) and, mid-way, a
    category (Agrawal: elevel 4) or a class (LED: digit 9) that was held back until then.
    Returns the stream, feature kinds and, per record, how many labels are known by then."""
    if which == "agrawal":
        base = _synthetic("agrawal", 6_000, classification_function=2, seed=4)
        held = base.X[:, base.keys.index("elevel")] == 4
        kinds = _kinds(base, AGRAWAL_NOMINAL)
    else:
        base = _synthetic("led", 6_000, seed=2, noise_percentage=0.1, irrelevant_features=True)
        held = _led_digits(base) == 9
        kinds = ["category"] * len(base.keys)
    early = np.flatnonzero(~held)[:1_500]
    s = _reorder(base, np.r_[early, np.arange(early[-1] + 1, len(base.y))][:MIXED_N])
    X = s.X.copy()
    X[np.random.default_rng(0).random(X.shape) < 0.05] = np.nan
    known = np.maximum.accumulate(s.y) + 1      # codes are in first-seen order
    return s._replace(X=X), kinds, known


def _feed(s: Stream, kinds, known, bounds, **settings) -> tuple[TreeClassifier, Scored]:
    """Learn the stream in batches [bounds[i], bounds[i+1]); each call is given the labels
    known by the end of its batch, so the class list grows as a live feed's would."""
    model = TreeClassifier(s.names, kinds, TreeSettings(**settings))
    parts = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        labels = s.classes[:known[b - 1]]
        parts.append(_learn(model, s.X[a:b], s.y[a:b], labels))
    return model, Scored(*(np.concatenate([getattr(p, f) for p in parts])
                           for f in ("pred", "confidence", "leaf")))


@functools.lru_cache(maxsize=None)
def _one_by_one(which: str, **settings):
    s, kinds, known = _mixed_stream(which)
    return _feed(s, kinds, known, list(range(len(s.y) + 1)), **settings)


def _check_batches(which, cuts, config) -> None:
    """One batch, the given cuts and record by record: the same outputs and tables."""
    s, kinds, known = _mixed_stream(which)
    single, whole = _one_by_one(which, **config)
    batched, parts = _feed(s, kinds, known, [0, *sorted(cuts), len(s.y)], **config)
    one, once = _feed(s, kinds, known, [0, len(s.y)], **config)
    for field in ("pred", "confidence", "leaf"):
        for other in (parts, once):
            assert np.array_equal(getattr(other, field), getattr(whole, field),
                                  equal_nan=field == "confidence"), field
    _assert_same_model(batched, single)
    _assert_same_model(one, single)


_batch_settings = dict(which=st.sampled_from(["agrawal", "led"]),
                       cuts=st.lists(st.integers(1, MIXED_N - 1), max_size=60, unique=True),
                       splits=st.sampled_from(["gaussian", "histogram"]),
                       leaf_model=st.sampled_from(["majority", "naive_bayes", "adaptive"]),
                       criterion=st.sampled_from(["info_gain", "gini"]))


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(**_batch_settings)
def test_batches_give_the_same_predictions_and_tables(which, cuts, splits, leaf_model,
                                                      criterion):
    # source: the test-then-train semantics (each record is scored by the tree learned
    # from the records before it) do not depend on how a stream is cut into batches
    _check_batches(which, cuts, dict(numeric_splits=splits, leaf_model=leaf_model,
                                     criterion=criterion, **MIXED_SETTINGS, **PLAIN))


_DETECTORS = sorted(set(DETECTORS) - {"off"})


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(**_batch_settings, detector=st.sampled_from(_DETECTORS))
def test_batches_with_drift_detectors_give_the_same_predictions_and_tables(
        which, cuts, splits, leaf_model, criterion, detector):
    # with drift watching too: alternates start, swap and drop, and dead node ids are
    # recycled, at the same records whatever the batch cuts (the kernel returns before it
    # recycles, so recycling happens at a fixed record), so node ids and tables agree
    _check_batches(which, cuts, dict(numeric_splits=splits, leaf_model=leaf_model,
                                     criterion=criterion, detector=detector,
                                     **MIXED_SETTINGS))


@pytest.mark.parametrize("which", ["agrawal", "led"])
def test_the_mixed_streams_exercise_what_they_claim(which):
    # guards the property test above: missing values, a multiway split (Agrawal) or a class
    # arriving after the tree has grown (LED), and a tree that actually splits
    s, kinds, known = _mixed_stream(which)
    model, _ = _one_by_one(which, numeric_splits="gaussian", leaf_model="adaptive",
                           criterion="info_gain", **MIXED_SETTINGS, **PLAIN)
    assert np.isnan(s.X).any()
    assert model.counters()["splits"] >= 2
    if which == "agrawal":
        assert (model.tables_.node_i[:model.n_nodes, KIND] == MULTIWAY).any()
    else:
        assert known[1_499] == 9 and known[-1] == 10
        created = model.tables_.node_i[1:model.n_nodes, CREATED]    # all but the root
        assert created.min() < 1_500 < created.max()   # splits before and after digit 9


def test_input_is_not_mutated_and_layout_does_not_matter():
    s, kinds, known = _mixed_stream("agrawal")
    X, y = s.X.copy(), s.y.copy()
    model = TreeClassifier(s.names, kinds)
    scored = _learn(model, X, y, s.classes)
    assert np.array_equal(X, s.X, equal_nan=True) and np.array_equal(y, s.y)
    with np.errstate(all="raise"):
        model.predict(X)
    assert np.array_equal(X, s.X, equal_nan=True)
    # a Fortran-ordered copy, int64 labels and a list of classes as tuple give the same
    other = TreeClassifier(s.names, kinds)
    again = _learn(other, np.asfortranarray(X), y.astype(np.int64), tuple(s.classes))
    assert np.array_equal(again.pred, scored.pred)
    _assert_same_model(other, model)


def test_empty_batches_give_empty_outputs_and_change_nothing():
    s, kinds, known = _mixed_stream("agrawal")
    model = TreeClassifier(s.names, kinds)
    empty_x, empty_y = np.empty((0, len(s.names))), np.empty(0, np.int32)
    out = _learn(model, empty_x, empty_y, [])
    assert out.pred.shape == out.confidence.shape == out.leaf.shape == (0,)
    assert out.pred.dtype == np.int32 and out.confidence.dtype == np.float64
    _learn(model, s.X[:2_000], s.y[:2_000], s.classes[:known[1_999]])
    before = _logical_tables(model)
    out = _learn(model, empty_x, empty_y, s.classes[:known[1_999]])
    assert out.pred.size == 0
    after = _logical_tables(model)
    assert all(np.array_equal(before[k], after[k], equal_nan=True) for k in before)
    with np.errstate(all="raise"):
        assert model.predict(empty_x).pred.size == 0


def test_scores_before_any_label_are_minus_one():
    # nothing learned yet: no class to predict (documented as -1)
    s, kinds, _ = _mixed_stream("agrawal")
    model = TreeClassifier(s.names, kinds)
    with np.errstate(all="raise"):
        assert model.predict(s.X[:3]).pred.tolist() == [-1, -1, -1]
    assert _learn(model, s.X[:1], s.y[:1], s.classes[:1]).pred.tolist() == [-1]


@pytest.mark.parametrize("leaf_model", ["majority", "naive_bayes", "adaptive"])
def test_confidence_is_a_probability_when_categories_start_missing(leaf_model):
    # KNOWN BUG (fails for naive_bayes at the time of writing): splits.
    # category_log_likelihood returns log((0 + 1) / (0 + n_codes)) = log(1/0) = +inf when a
    # categorical feature has had no value yet anywhere (fmap FM_SEEN = 0, so n_codes = 0)
    # and the record being scored has one; naive_bayes_scores then computes
    # exp(inf - inf) = NaN. Smallest input: one category feature, X = [[nan], [0], [1]],
    # y = [0, 1, 0], leaf_model="naive_bayes" -> confidence [0, nan, ...]. Here: the mixed
    # Agrawal stream, whose records 0 and 1 both lack age and record 0 lacks elevel.
    # A confidence is the predicted class's probability (common practice): finite, in [0, 1].
    s, kinds, known = _mixed_stream("agrawal")
    model = TreeClassifier(s.names, kinds, _settings(leaf_model=leaf_model))
    scored = _learn(model, s.X, s.y, s.classes)
    bad = np.flatnonzero(~((scored.confidence >= 0.0) & (scored.confidence <= 1.0)))
    assert bad.size == 0, (f"{bad.size} confidences outside [0, 1], first at record "
                           f"{bad[:3]}: {scored.confidence[bad[:3]]}")


# ================================================================ f. categorical features

@pytest.mark.parametrize("function", [2, 3])
def test_categorical_default_leaves_against_river(function):
    # source: river 0.26.1 HoeffdingTreeClassifier(nominal_attributes=[elevel, car, zipcode]),
    # default nba leaves. Splits do not depend on the leaf model, so the trees are identical;
    # predictions are not: sapwood's naive Bayes smooths category frequencies (Laplace) and
    # leaves out classes without weight, river multiplies by 1 for a category a class has not
    # shown and gives a class without weight a vote of log 1. Measured over 30k records:
    # f2 0.9618 vs 0.9608, f3 0.8602 vs 0.8550 (f8: 0.9262 vs 0.9150).
    s = _synthetic("agrawal", 30_000, classification_function=function, seed=4)
    model, ours = _sapwood(s, AGRAWAL_NOMINAL)
    reference = river_tree.HoeffdingTreeClassifier(nominal_attributes=list(AGRAWAL_NOMINAL))
    theirs = _river(s, reference)
    _assert_same_tree(_sapwood_shape(model, s.keys), _river_shape(reference._root))
    assert (model.tables_.node_i[:model.n_nodes, KIND] == MULTIWAY).any()
    ours_acc, theirs_acc = np.mean(ours.pred == s.y), np.mean(theirs == s.y)
    assert ours_acc >= theirs_acc - 0.01, f"{ours_acc:.4f} vs river {theirs_acc:.4f}"


def _path(t, n: int) -> list[int]:
    """Node ids from ``n`` up to the root."""
    out = []
    while n >= 0:
        out.append(int(n))
        n = t.node_i[n, PARENT]
    return out


def test_unseen_category_mid_stream_gets_its_own_branch():
    # source: river 0.26.1 (nominal attributes, mc leaves) on the same stream: an unseen value
    # at a multiway split is scored along the heaviest branch, then learned in a new branch.
    # Agrawal function 2 (seed 4) splits the root on elevel; elevel 4 is held back for the
    # first 6000 records. Measured: 0 differing predictions.
    base = _synthetic("agrawal", 20_000, classification_function=2, seed=4)
    column = base.keys.index("elevel")
    early = np.flatnonzero(base.X[:, column] != 4)[:6_000]
    s = _reorder(base, np.r_[early, np.arange(early[-1] + 1, len(base.y))])
    model = TreeClassifier(s.names, _kinds(s, AGRAWAL_NOMINAL), _settings(leaf_model="majority"))
    first = _learn(model, s.X[:6_000], s.y[:6_000], s.classes)
    t = model.tables_
    assert t.node_i[0, KIND] == MULTIWAY and s.keys[t.node_i[0, FEATURE]] == "elevel"
    root_kids = dict(_sapwood_shape(model, s.keys)[2])
    assert sorted(root_kids) == [0, 1, 2, 3]
    leaves_before = model.n_leaves

    second = _learn(model, s.X[6_000:], s.y[6_000:], s.classes)
    t = model.tables_
    start = t.node_i[0, CHILD_START]
    new = int(t.child_table[start + 4])
    arrivals = 6_000 + np.flatnonzero(s.X[6_000:, column] == 4)
    assert new >= 0, "no branch for the new category"
    assert t.node_i[new, CREATED] == arrivals[0]     # made by the first record with elevel 4
    assert t.node_f[new, WEIGHT] == arrivals.size    # and every such record went there
    assert model.n_leaves >= leaves_before + 1
    leaf = np.r_[first.leaf, second.leaf]
    assert new not in _path(t, leaf[arrivals[0]])    # scored along the heaviest branch
    assert all(new in _path(t, n) for n in leaf[arrivals[1:]])   # later ones in its subtree

    theirs = _river(s, river_tree.HoeffdingTreeClassifier(
        leaf_prediction="mc", nominal_attributes=list(AGRAWAL_NOMINAL)))
    assert np.array_equal(np.r_[first.pred, second.pred], theirs)


def test_new_class_mid_stream_is_learned():
    # source: river 0.26.1 (mc leaves, all features nominal, tau 0.2) on the same stream, and
    # the LED Bayes-optimal rate. Digit 9 is held back for the first 8000 records; by then
    # the tree has several leaves (tau = 0.2 lets it split early). Measured: 0 differing
    # predictions with majority leaves; with the default leaves, recall of 9 over the last
    # 6000 records 0.695 (the Bayes-optimal classifier's recall of 9 is 0.568: it trades 9
    # for 8; a model that never learned 9 would score 0) and accuracy 0.759 (bound 0.765).
    base = _synthetic("led", 25_000, seed=5, noise_percentage=0.1, irrelevant_features=True)
    early = np.flatnonzero(_led_digits(base) != 9)[:8_000]
    s = _reorder(base, np.r_[early, np.arange(early[-1] + 1, len(base.y))][:20_000])
    nine = s.classes.index("9")
    assert nine == 9 and np.all(s.y[:8_000] != nine)
    late = np.arange(len(s.y)) >= 14_000

    preds = {}
    for leaf_model in ("majority", "adaptive"):
        model = TreeClassifier(s.names, ["category"] * 24,
                               _settings(leaf_model=leaf_model, tie_threshold=0.2))
        a = _learn(model, s.X[:8_000], s.y[:8_000], s.classes[:9])
        assert model.n_leaves >= 3
        b = _learn(model, s.X[8_000:], s.y[8_000:], s.classes)
        preds[leaf_model] = pred = np.r_[a.pred, b.pred]
        assert model.counters()["classes_seen"] == 10
        recall = np.mean(pred[late & (s.y == nine)] == nine)
        assert recall >= 0.5, f"{leaf_model}: recall of the new class {recall:.3f}"
    theirs = _river(s, river_tree.HoeffdingTreeClassifier(
        leaf_prediction="mc", tau=0.2, nominal_attributes=list(s.keys)))
    assert np.array_equal(preds["majority"], theirs)
    late_acc = np.mean(preds["adaptive"][late] == s.y[late])
    assert led_bayes_accuracy(0.09) - 0.02 <= late_acc <= led_bayes_accuracy(0.09) + 0.02


# ================================================================ g. memory bound

def _promise(t, n: int) -> float:
    return float(t.counts[n].sum() - t.counts[n].max())


def test_memory_cap_keeps_the_most_promising_leaves_active():
    # source: Domingos & Hulten, KDD 2000, section "memory": when memory runs out, the
    # leaves with the least promise (records reaching them x their error) are deactivated;
    # river's LeafMajorityClass.calculate_promise is the same formula (total - majority).
    s = _synthetic("sea", 30_000, variant=0, noise=0.1, seed=3)
    per_leaf = 8 * 7 * 3 * 2    # gauss: 7 float64 per numeric feature and class (tables.py)
    model = TreeClassifier(s.names, ["numeric"] * 3, _settings(memory_mb=4.5 * per_leaf / 2**20))
    cap = leaf_cap(model.tables_)
    assert cap == 4
    last, checked, most_active = None, 0, 0
    for i in range(len(s.y)):
        _learn(model, s.X[i:i + 1], s.y[i:i + 1], s.classes)
        most_active = max(most_active, model.n_active_leaves)
        assert model.n_active_leaves <= cap, f"record {i}: {model.n_active_leaves} active"
        counters = model.counters()
        if counters != last:      # a split or prepruning just re-ranked the leaves
            t = model.tables_
            leaves = [n for n in range(model.n_nodes) if t.node_i[n, KIND] == LEAF]
            active = [_promise(t, n) for n in leaves if t.node_i[n, SLOT] >= 0]
            inactive = [_promise(t, n) for n in leaves if t.node_i[n, SLOT] < 0]
            if active and inactive:
                assert min(active) >= max(inactive), f"record {i}: {active} vs {inactive}"
                checked += 1
            last = counters
    t = model.tables_
    assert model.n_leaves > cap and model.counters()["deactivated"] > 0 and checked >= 5
    assert most_active == cap
    for n in range(model.n_nodes):
        if t.node_i[n, KIND] == LEAF:
            stats = {k: float(w) for k, w in enumerate(t.counts[n]) if w > 0}
            assert _promise(t, n) == LeafMajorityClass(stats, 0, None).calculate_promise()


def _agrawal_holding_back(column: str, value: int) -> Stream:
    base = _synthetic("agrawal", 30_000, classification_function=2, seed=4)
    held = base.X[:, base.keys.index(column)] == value
    return _reorder(base, np.r_[np.flatnonzero(~held)[:8_000], np.flatnonzero(held)[:50]])


def test_memory_cap_holds_when_an_unseen_category_opens_a_branch():
    # KNOWN BUG (fails at the time of writing): classifier_kernel.route_to_learn activates the
    # leaf it creates for a category unseen at a multiway split without calling
    # enforce_leaf_cap, so a full tree goes one leaf over the cap per new category. Here the
    # cap is 3 and record 8000 (the first with elevel 4) leaves 4 leaves active.
    s = _agrawal_holding_back("elevel", 4)
    model = TreeClassifier(s.names, _kinds(s, AGRAWAL_NOMINAL),
                           _settings(memory_mb=6_000 / 2**20))
    for i in range(len(s.y)):
        cap_before = leaf_cap(model.tables_)
        _learn(model, s.X[i:i + 1], s.y[i:i + 1], s.classes)
        cap = leaf_cap(model.tables_)
        if model.n_active_leaves > cap:
            pytest.fail(f"record {i} (elevel {s.X[i, s.keys.index('elevel')]:g}): "
                        f"{model.n_active_leaves} active leaves, cap {cap} "
                        f"(cap before the record: {cap_before})")
    assert model.n_leaves > cap      # the cap was binding


def test_memory_cap_holds_when_a_new_category_code_shrinks_the_cap():
    # KNOWN BUG (fails at the time of writing): the cap is budget / bytes per leaf, and the
    # bytes per leaf grow with the highest category code seen (S_CATS_SEEN) and the classes
    # seen; when they grow, learn_batch does not re-run enforce_leaf_cap, so the active
    # leaves exceed the new, smaller cap until the next split somewhere. Here car 20 is held
    # back; the budget is set between 4 leaves at 20 codes and 4 leaves at 21 codes.
    s = _agrawal_holding_back("car", 20)
    model = TreeClassifier(s.names, _kinds(s, AGRAWAL_NOMINAL))
    state = model.tables_.state.copy()
    state[S_CLASSES_SEEN] = 2
    sizes = []
    for cats in (20, 21):     # 1 + highest code: car 19, then car 20
        state[S_CATS_SEEN] = cats
        sizes.append(leaf_bytes(state, 6, 3, 0, 0))
    budget = 4 * (sizes[0] + sizes[1]) / 2
    model = TreeClassifier(s.names, _kinds(s, AGRAWAL_NOMINAL),
                           _settings(memory_mb=budget / 2**20))
    _learn(model, s.X[:8_000], s.y[:8_000], s.classes)
    assert leaf_cap(model.tables_) == 4 and model.n_active_leaves == 4    # the premise
    _learn(model, s.X[8_000:8_001], s.y[8_000:8_001], s.classes)
    assert leaf_cap(model.tables_) == 3
    assert model.n_active_leaves <= 3, (
        f"{model.n_active_leaves} active leaves after the cap fell to 3")


# ================================================================ h. histogram split statistic

@pytest.mark.parametrize("seed", range(5))
def test_histogram_finds_a_skewed_cut_the_gaussian_candidates_miss(seed):
    # source: scipy.stats.lognorm gives the true cut (the 30 % quantile of lognormal(0, 1.5))
    # of a stream labelled x > cut with 5 % label noise, plus a uniform irrelevant feature.
    # The Gaussian split statistic's candidates are evenly spaced between the observed min and max:
    # with a long right tail the nearest lies far above the cut. The histogram's bins sit at
    # quantiles of the first 128 values, so an edge lies near the cut.
    # Measured over seeds 0-4: histogram F(threshold) 0.276-0.306; Gaussian 0.66-0.98 (or
    # the irrelevant feature); prequential accuracy 0.940-0.947 vs 0.892-0.945.
    rng = np.random.default_rng(seed)
    shape, q, n = 1.5, 0.30, 20_000
    x = rng.lognormal(0.0, shape, n)
    cut = scipy_stats.lognorm.ppf(q, shape)
    y = ((x > cut) ^ (rng.random(n) < 0.05)).astype(np.int32)
    X = np.c_[x, rng.random(n)]
    found = {}
    for splits in ("gaussian", "histogram"):
        model = TreeClassifier(["x", "u"], ["numeric"] * 2,
                               _settings(numeric_splits=splits))
        right = _learn(model, X, y, ["0", "1"]).pred == y
        feature, threshold, seen = _root_split(model)
        found[splits] = (feature, scipy_stats.lognorm.cdf(threshold, shape), seen, right)
    feature, level, _, hist_right = found["histogram"]
    assert feature == 0 and abs(level - q) <= 0.05, f"histogram cut at quantile {level:.3f}"
    feature, level, seen, gauss_right = found["gaussian"]
    # why the Gaussian split statistic cannot: its nearest candidate, from the records it had seen
    lo, hi = x[:seen].min(), x[:seen].max()
    candidates = lo + (hi - lo) * np.arange(1, 11) / 11
    assert np.min(np.abs(scipy_stats.lognorm.cdf(candidates, shape) - q)) > 0.2
    assert feature != 0 or abs(level - q) > 0.2
    # and the better cut shows in accuracy (Bayes-optimal 0.95 by construction)
    assert hist_right.mean() >= gauss_right.mean() - 0.002
    assert hist_right.mean() <= 0.95 + 3 * math.sqrt(0.95 * 0.05 / n)
