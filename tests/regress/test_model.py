"""The Hoeffding regression tree: behaviour, exactness properties and outside checks.

Outside sources, each named beside its check:

* river 0.26.1 ``tree.HoeffdingTreeRegressor`` / ``HoeffdingAdaptiveTreeRegressor`` (the
  reference learners) on river's ``Friedman`` and ``FriedmanDrift`` generators (Friedman,
  Annals of Statistics 1991; Ikonomovska, Gama & Dzeroski, DMKD 2011); river's
  ``VarianceReductionSplitCriterion`` for the merit formula.
* scikit-learn ``DecisionTreeRegressor(max_depth=1)`` for the root split.
* The Hoeffding bound (Hoeffding 1963; Domingos & Hulten 2000): check values in
  tests/README.md (eps(200) = 0.20074 for R = 1, delta = 1e-7).
* Worked examples derived by hand (definitions of mean, sample variance, least squares).

The long comparisons with river are marked ``slow`` (they run by default).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from stream.bench.regression import (compare_with_river, friedman, friedman_drift,
                                     river_counterpart, run_river, run_sapwood,
                                     wide_friedman)
from stream.errors import ConfigError, ModelFileError
from stream.regress.criteria import split_confident, split_merit, stats_add, stats_sub
from stream.regress.model import TreeRegressor
from stream.regress.settings import RegressionSettings
from stream.regress.splits import (category_best, observe, quantile_best, quantile_set_edges,
                                   set_filled_edges)
from stream.regress.tables import (CREATED, FEATURE, KIND, LEAF, MULTIWAY, NUMERIC,
                                   Q_NEDGES, S_NODES, SC_MEAN, SC_SD, THRESHOLD, allocate)
from stream.rules.regress import (Consequent, format_consequent, format_value,
                                  leaf_consequent, leaf_consequents, linear_formula)
from stream.tree.paths import node_conditions


def _mixed_stream(n: int, seed: int):
    """Numeric and categorical inputs with missing values and a category that first
    appears mid-stream; the target mixes a step, a slope and category effects."""
    rng = np.random.default_rng(seed)
    X = np.empty((n, 3))
    X[:, 0] = rng.uniform(-2.0, 2.0, n)
    X[:, 1] = rng.integers(0, 3, n)
    X[n // 2:, 1] = rng.integers(0, 5, n - n // 2)      # codes 3 and 4 appear late
    X[:, 2] = rng.normal(10.0, 3.0, n)
    y = np.where(X[:, 0] > 0.3, 5.0, -1.0) + 0.5 * X[:, 2] + np.array(
        [0.0, 2.0, -2.0, 4.0, 1.0])[X[:, 1].astype(int)] + rng.normal(0.0, 0.3, n)
    X[rng.random((n, 3)) < 0.05] = np.nan
    return X, y


NAMES = ["temp", "mode", "load"]
KINDS = ["numeric", "category", "numeric"]


# ================================================================ settings and inputs

@pytest.mark.parametrize("kwargs, message", [
    ({"grace_period": 0}, "grace period must be a whole number >= 1, got 0"),
    ({"learning_rate": 2.0}, "learning rate must be a number in (0, 2), got 2.0"),
    ({"leaf_model": "median"}, "leaf model must be one of adaptive, linear, mean, got 'median'"),
    ({"criterion": "gini"}, "criterion must be one of deviation, variance, got 'gini'"),
    ({"bins": 1}, "bins must be a whole number >= 2, got 1"),
    ({"selector_decay": 0.0}, "selector decay must be a number in (0, 1], got 0.0"),
])
def test_settings_are_validated_with_the_template(kwargs, message):
    with pytest.raises(ConfigError) as err:
        RegressionSettings(**kwargs)
    assert str(err.value) == message


def test_settings_round_trip_and_unknown_names():
    s = RegressionSettings(leaf_model="linear", bins=16)
    assert RegressionSettings.from_dict(s.to_dict()) == s
    with pytest.raises(ConfigError, match="unknown setting 'nope'"):
        RegressionSettings.from_dict({"nope": 1})


def test_bad_inputs_name_the_row_and_field():
    model = TreeRegressor(NAMES, KINDS)
    X = np.array([[0.0, 1.0, 2.0], [0.0, 1.0, 2.0]])
    with pytest.raises(ConfigError,
                       match=r"target values must be finite numbers of magnitude at most "
                             r"1e\+100, got nan at row 1"):
        model.learn(X, np.array([1.0, np.nan]))
    with pytest.raises(ConfigError, match=r"got 1e\+200 at row 0"):
        model.learn(X, np.array([1e200, 1.0]))
    with pytest.raises(ConfigError, match=r"got -1e\+150 in field 'load' at row 1"):
        model.learn(np.array([[0.0, 1.0, 2.0], [0.0, 1.0, -1e150]]), np.array([1.0, 2.0]))
    with pytest.raises(ConfigError, match=r"got inf in field 'load' at row 0"):
        model.learn(np.array([[0.0, 1.0, np.inf]]), np.array([1.0]))
    with pytest.raises(ConfigError, match=r"got 1.5 in field 'mode' at row 0"):
        model.learn(np.array([[0.0, 1.5, 2.0]]), np.array([1.0]))
    with pytest.raises(ConfigError, match="X must have 3 columns"):
        model.learn(np.zeros((2, 2)), np.zeros(2))
    with pytest.raises(ConfigError, match="feature kind must be"):
        TreeRegressor(["a"], ["text"])


# ================================================================ scoring before learning

def test_each_record_is_scored_before_it_is_learned():
    # by hand: a mean leaf predicts the mean of the targets it has learned (0 before any)
    model = TreeRegressor(["x"], ["numeric"], RegressionSettings(leaf_model="mean"))
    scored = model.learn(np.array([[1.0], [2.0], [3.0], [4.0]]), np.array([4.0, 8.0, 0.0, 2.0]))
    assert scored.pred.tolist() == [0.0, 4.0, 6.0, 4.0]
    assert scored.leaf.tolist() == [0, 0, 0, 0]
    assert model.predict(np.array([[9.0]])).pred.tolist() == [3.5]


def test_empty_batches_and_predict_on_an_empty_tree():
    model = TreeRegressor(NAMES, KINDS)
    scored = model.learn(np.empty((0, 3)), np.empty(0))
    assert scored.pred.shape == (0,) and model.records_learned == 0
    assert model.predict(np.array([[1.0, 0.0, 2.0]])).pred.tolist() == [0.0]


def test_predict_equals_the_score_learn_would_give():
    X, y = _mixed_stream(3000, 3)
    model = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=50))
    model.learn(X[:2000], y[:2000])
    predicted = model.predict(X[2000:2100]).pred
    for i in range(2000, 2010):
        twin = TreeRegressor.from_state(*model.state())
        assert twin.learn(X[i:i + 1], y[i:i + 1]).pred[0] == predicted[i - 2000]


# ================================================================ exactness properties

def _run_in_chunks(X, y, cuts, settings):
    model = TreeRegressor(NAMES, KINDS, settings)
    preds, leaves = [], []
    bounds = [0] + sorted(set(cuts)) + [len(y)]
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        scored = model.learn(X[lo:hi], y[lo:hi])
        preds.append(scored.pred)
        leaves.append(scored.leaf)
    return model, np.concatenate(preds), np.concatenate(leaves)


_STREAM = _mixed_stream(4000, 11)


@hsettings(max_examples=12, deadline=None)
@given(cuts=st.lists(st.integers(1, 3999), max_size=12),
       leaf_model=st.sampled_from(["mean", "linear", "adaptive"]))
def test_results_do_not_depend_on_batch_size(cuts, leaf_model):
    X, y = _STREAM
    settings = RegressionSettings(grace_period=60, leaf_model=leaf_model)
    whole, p_whole, l_whole = _run_in_chunks(X, y, [], settings)
    part, p_part, l_part = _run_in_chunks(X, y, cuts, settings)
    assert np.array_equal(p_whole, p_part)
    assert np.array_equal(l_whole, l_part)
    n = int(whole.tables_.state[S_NODES])
    assert n == int(part.tables_.state[S_NODES]) and whole.n_nodes > 5
    for name in ("node_f", "lin", "lin_x", "scale"):
        assert np.array_equal(getattr(whole.tables_, name)[:n], getattr(part.tables_, name)[:n],
                              equal_nan=True)
    # the child table's layout follows the category capacity, which batches reach at
    # different times; the tree it encodes is the same
    assert _children(whole) == _children(part)
    keep = [c for c in range(whole.tables_.node_i.shape[1]) if c not in (2, 3)]
    assert np.array_equal(whole.tables_.node_i[:n, keep], part.tables_.node_i[:n, keep])


def _children(model) -> list[dict]:
    t = model.tables_
    out = []
    for node in range(int(t.state[S_NODES])):
        start, count = t.node_i[node, 2], t.node_i[node, 3]
        out.append({k: int(c) for k, c in enumerate(t.child_table[start:start + count])
                    if c >= 0} if t.node_i[node, KIND] != LEAF else {})
    return out


def test_record_by_record_equals_one_batch():
    X, y = _STREAM
    settings = RegressionSettings(grace_period=60)
    _, p_whole, _ = _run_in_chunks(X[:1500], y[:1500], [], settings)
    _, p_single, _ = _run_in_chunks(X[:1500], y[:1500], list(range(1, 1500)), settings)
    assert np.array_equal(p_whole, p_single)


def test_inputs_are_not_mutated_and_outputs_are_finite():
    X, y = _STREAM
    X0, y0 = X.copy(), y.copy()
    model = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=60))
    with np.errstate(all="raise"):
        scored = model.learn(X, y)
        again = model.predict(X)
    assert np.array_equal(X, X0, equal_nan=True) and np.array_equal(y, y0)
    assert np.isfinite(scored.pred).all() and np.isfinite(again.pred).all()


def test_state_round_trip_continues_identically_and_owns_its_arrays():
    X, y = _STREAM
    model = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=60))
    model.learn(X[:2500], y[:2500])
    meta, arrays = model.state()
    twin = TreeRegressor.from_state(meta, arrays)
    a = model.learn(X[2500:], y[2500:])
    b = twin.learn(X[2500:], y[2500:])
    assert np.array_equal(a.pred, b.pred)
    assert np.array_equal(arrays["node_f"][:1], TreeRegressor.from_state(
        meta, arrays).tables_.node_f[:1])        # the saved copy was not touched by learning
    assert twin.n_nodes == model.n_nodes and twin.depth == model.depth


def test_damaged_state_is_refused():
    model = TreeRegressor(NAMES, KINDS)
    model.learn(*_mixed_stream(500, 1))
    meta, arrays = model.state()
    with pytest.raises(ModelFileError, match="lacks table 'lin'"):
        TreeRegressor.from_state(meta, {k: v for k, v in arrays.items() if k != "lin"})
    broken = dict(arrays, child_table=arrays["child_table"][:1])
    broken["state"] = arrays["state"].copy()
    broken["state"][2] = 50                       # more child entries than the table holds
    with pytest.raises(ModelFileError):
        TreeRegressor.from_state(meta, broken)
    other = dict(meta, settings=RegressionSettings(bins=8).to_dict())
    with pytest.raises(ModelFileError, match="other settings"):
        TreeRegressor.from_state(other, arrays)


# ================================================================ tree growth

def test_categories_new_codes_missing_values_and_growth():
    X, y = _mixed_stream(6000, 5)
    model = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=100))
    scored = model.learn(X, y)
    t = model.tables_
    main = model.main_nodes()
    assert model.n_leaves == int((t.node_i[main, KIND] == LEAF).sum()) > 4
    n = int(t.state[S_NODES])
    assert MULTIWAY in t.node_i[:n, KIND] or 3 in t.node_i[:n, KIND]
    # late codes 3 and 4 reached a leaf of their own or the catch-all branch, and the
    # second half is predicted far better than the spread of the target
    # the second half (codes 3 and 4 included) is predicted far better than by its
    # mean; records with a missing input can only be guessed along the heaviest branch
    late = np.arange(len(y)) >= 4000
    complete = late & ~np.isnan(X).any(axis=1)
    assert np.sqrt(np.mean((scored.pred[complete] - y[complete]) ** 2)) < 0.2 * y[late].std()
    assert np.sqrt(np.mean((scored.pred[late] - y[late]) ** 2)) < 0.5 * y[late].std()
    assert set(np.unique(X[late & complete, 1])) == {0, 1, 2, 3, 4}
    # a record missing the root's feature follows the root's heaviest child
    root_feature = int(t.node_i[0, FEATURE])
    kids = [int(c) for c in t.child_table[t.node_i[0, 2]:t.node_i[0, 2] + t.node_i[0, 3]]
            if c >= 0]
    heaviest = max(kids, key=lambda c: (t.node_f[c, 1], -c))
    probe = X[~np.isnan(X).any(axis=1)][:50].copy()
    probe[:, root_feature] = np.nan
    for leaf in model.predict(probe).leaf:
        node = int(leaf)
        while int(t.node_i[node, 4]) != 0:
            node = int(t.node_i[node, 4])
        assert node == heaviest


def test_max_depth_and_memory_budget():
    X, y = _mixed_stream(6000, 6)
    shallow = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=50, max_depth=2))
    shallow.learn(X, y)
    assert shallow.depth <= 2
    tight = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=50, memory_mb=0.05))
    scored = tight.learn(X, y)
    assert tight.n_active_leaves <= max(1, int(0.05 * 2 ** 20 / _leaf_bytes(tight)))
    assert tight.counters()["deactivated"] > 0
    assert np.isfinite(scored.pred).all()


def _leaf_bytes(model) -> float:
    t = model.tables_
    bins, buffer = t.q_stats.shape[2], t.q_buf.shape[2]
    return 8.0 * (t.q_stats.shape[1] * ((bins - 1) + 3 * bins + 2 * buffer + 3)
                  + t.c_stats.shape[1] * 3 * max(int(t.state[6]), 1))


def test_children_start_from_their_side_of_the_split():
    # by hand: after a one-level split every leaf's count, mean and spread are those of
    # the records that reached it (the root observed every record from the start)
    rng = np.random.default_rng(2)
    X = rng.uniform(0.0, 1.0, (3000, 1))
    y = np.where(X[:, 0] <= 0.4, 3.0, 10.0) + rng.normal(0.0, 1.0, 3000)
    model = TreeRegressor(["x"], ["numeric"], RegressionSettings(max_depth=1, leaf_model="mean"))
    scored = model.learn(X, y)
    assert model.n_nodes == 3
    cons = leaf_consequents(model)
    for leaf, c in cons.items():
        mine = y[model.predict(X).leaf == leaf]
        assert c.records == len(mine)
        assert c.mean == pytest.approx(mine.mean(), rel=1e-12)
        assert c.spread == pytest.approx(mine.std(ddof=1), rel=1e-9)
        assert c.coverage == pytest.approx(len(mine) / 3000)
        assert c.model == "mean" and c.intercept is None
    # the leaves scored every record after the split, the root every one before it
    split_at = int(model.tables_.node_i[1, CREATED])
    assert sum(c.scored for c in cons.values()) == 3000 - split_at
    assert np.all(scored.leaf[:split_at] == 0) and np.all(scored.leaf[split_at:] > 0)


# ================================================================ criteria and split statistics

def _stats(values):
    values = np.asarray(values, float)
    return np.array([len(values), values.mean() if len(values) else 0.0,
                     ((values - values.mean()) ** 2).sum() if len(values) else 0.0])


def test_merging_statistics_matches_numpy():
    rng = np.random.default_rng(4)
    a, b = rng.normal(5, 2, 300), rng.normal(-1, 7, 200)
    merged = _stats(a)
    stats_add(merged, _stats(b))
    assert np.allclose(merged, _stats(np.concatenate([a, b])), rtol=1e-12)
    rest = np.zeros(3)
    stats_sub(_stats(np.concatenate([a, b])), _stats(a), rest)
    assert np.allclose(rest, _stats(b), rtol=1e-9)


def test_variance_reduction_matches_river():
    # source: river 0.26.1 VarianceReductionSplitCriterion.merit_of_split (sample variances)
    from river.stats import Var
    from river.tree.split_criterion import VarianceReductionSplitCriterion
    rng = np.random.default_rng(8)
    left, right = rng.normal(2, 1, 40), rng.normal(5, 3, 25)

    def var(values):
        v = Var()
        for value in values:
            v.update(float(value))
        return v
    expected = VarianceReductionSplitCriterion(min_samples_split=5).merit_of_split(
        var(np.concatenate([left, right])), [var(left), var(right)])
    ours = split_merit(0, _stats(np.concatenate([left, right])), _stats(left), _stats(right), 5.0)
    assert ours == pytest.approx(expected, rel=1e-10)
    assert split_merit(0, _stats(left), _stats(left[:4]), _stats(left[4:]), 5.0) == -math.inf
    # standard deviation reduction (FIMT-DD): sd(S) - sum |S_i|/|S| sd(S_i), by hand
    both = np.concatenate([left, right])
    sdr = both.std(ddof=1) - 40 / 65 * left.std(ddof=1) - 25 / 65 * right.std(ddof=1)
    assert split_merit(1, _stats(both), _stats(left), _stats(right), 5.0) == pytest.approx(sdr)


def test_ratio_test_uses_the_hoeffding_bound_for_range_one():
    # source: eps = sqrt(ln(1/delta) / 2n) with R = 1 (Hoeffding 1963); tests/README.md:
    # eps(200) = 0.20074 at delta = 1e-7, so the ratio must fall below 0.79926
    assert split_confident(1.0, 0.79, 200.0, 1e-7, 0.05)
    assert not split_confident(1.0, 0.81, 200.0, 1e-7, 0.05)
    assert not split_confident(0.0, -math.inf, 200.0, 1e-7, 0.05)
    assert split_confident(1.0, -math.inf, 200.0, 1e-7, 0.05)     # one candidate only
    # tie: eps < tau = 0.05 from n > ln(1e7) / (2 * 0.05^2) = 3223.6 (tests/README.md)
    assert not split_confident(1.0, 0.99, 3223.0, 1e-7, 0.05)
    assert split_confident(1.0, 0.99, 3224.0, 1e-7, 0.05)


def test_quantile_split_statistic_holds_exact_bin_statistics():
    # by hand: every value in (edge[e-1], edge[e]] lands in bin e, statistics exact
    settings = RegressionSettings(bins=8)
    t = allocate(settings, ["numeric"], slots=1)
    rng = np.random.default_rng(9)
    x = rng.exponential(3.0, 500)
    y = rng.normal(0, 1, 500) + x
    X = x[:, None]
    for i in range(500):
        if observe(t.q_edges, t.q_stats, t.q_buf, t.q_meta, t.c_stats, t.fmap, 0, X, i, y[i]):
            set_filled_edges(t.q_edges, t.q_stats, t.q_buf, t.q_meta, t.fmap, 0)
    ne = int(t.q_meta[0, 0, Q_NEDGES])
    edges = t.q_edges[0, 0, :ne]
    assert ne == 7 and np.all(np.diff(edges) > 0)
    first = np.sort(x[:32])                      # the buffer holds 4 x bins values
    assert set(edges) <= {0.5 * (a + b) for a, b in zip(first[:-1], first[1:])}
    bins = np.searchsorted(edges, x, side="left")
    for b in range(ne + 1):
        assert np.allclose(t.q_stats[0, 0, b], _stats(y[bins == b]), rtol=1e-9, atol=1e-9)
    left, right = np.zeros(3), np.zeros(3)
    merit, threshold = quantile_best(t.q_edges, t.q_stats, t.q_buf, t.q_meta, 0, 0, 0, 5.0,
                                     np.zeros((9, 3)), left, right)
    assert threshold in edges
    assert np.allclose(left, _stats(y[x <= threshold]))
    assert merit == pytest.approx(split_merit(0, _stats(y), _stats(y[x <= threshold]),
                                              _stats(y[x > threshold]), 5.0))
    best_by_hand = max(split_merit(0, _stats(y), _stats(y[x <= e]), _stats(y[x > e]), 5.0)
                       for e in edges)
    assert merit == pytest.approx(best_by_hand)


def test_quantile_edges_separate_every_value_of_a_discrete_feature():
    t = allocate(RegressionSettings(bins=8), ["numeric"], slots=1)
    values = np.array([0.0, 1.0] * 10 + [2.0] * 12)
    t.q_buf[0, 0, :32, 0] = values
    t.q_meta[0, 0, 2] = 32
    quantile_set_edges(t.q_edges, t.q_stats, t.q_buf, t.q_meta, 0, 0)
    assert t.q_edges[0, 0, :t.q_meta[0, 0, Q_NEDGES]].tolist() == [0.5, 1.5]


def test_category_candidates_by_hand():
    t = allocate(RegressionSettings(), ["category"], cats=4, slots=1)
    groups = {0: [1.0, 1.2, 0.8, 1.1, 0.9], 1: [5.0, 5.5, 4.5, 5.2, 4.8], 2: [1.0, 1.1, 0.9, 1.05,
                                                                             0.95]}
    for code, values in groups.items():
        t.c_stats[0, 0, code] = _stats(values)
    left, right = np.zeros(3), np.zeros(3)
    merit, multiway, code = category_best(t.c_stats, 0, 0, 3, 0, 5.0, True, np.zeros((5, 3)),
                                          left, right)
    everything = sum(groups.values(), [])
    assert (multiway, code) == (False, 1)          # code 1 against the rest, by hand
    assert merit == pytest.approx(split_merit(0, _stats(everything), _stats(groups[1]),
                                              _stats(groups[0] + groups[2]), 5.0))
    # three distinct levels: one branch per code beats any code-against-the-rest split
    groups[2] = [9.0, 9.1, 8.9, 9.05, 8.95]
    t.c_stats[0, 0, 2] = _stats(groups[2])
    everything = sum(groups.values(), [])
    merit_mw, multiway, _ = category_best(t.c_stats, 0, 0, 3, 0, 5.0, False, np.zeros((5, 3)),
                                          left, right)
    pooled = sum(len(v) / 15 * np.var(v, ddof=1) for v in groups.values())
    assert multiway and merit_mw == pytest.approx(np.var(everything, ddof=1) - pooled)


# ================================================================ rules data

def test_format_value_and_consequent_text():
    assert [format_value(v) for v in (42.0, 7.5, 0.012345, 12345.6, -1.25, 0.0)] == \
        ["42", "7.5", "0.0123", "12346", "-1.25", "0"]
    mean_leaf = Consequent("mean", 42.0, 7.5, 120.0, 0.3, None, (), 0, 100, 5.0, 6.0, True)
    assert format_consequent("minutes_to_excursion", mean_leaf) == \
        "minutes_to_excursion = 42 +- 7.5"
    linear_leaf = Consequent("linear", 40.0, 9.0, 120.0, 0.3, 12.3,
                             (("ambient_c", 0.8), ("compressor_amps", -1.2)), 3, 100, 5.0,
                             6.0, True)
    assert format_consequent("energy", linear_leaf) == \
        "energy = 12.3 + 0.8 * ambient_c - 1.2 * compressor_amps" \
        " (+3 smaller terms at their means)"
    assert linear_leaf.to_dict()["terms"][1] == {"feature": "compressor_amps",
                                                 "coefficient": -1.2}


def _linear_example(n: int = 6000):
    rng = np.random.default_rng(1)
    X = np.column_stack([rng.uniform(0.0, 10.0, n), rng.uniform(-5.0, 5.0, n)])
    return X, 2.0 + 3.0 * X[:, 0]


@pytest.mark.parametrize("leaf_model", ["linear", "adaptive"])
def test_exactly_linear_target_is_learned_to_near_zero_error(leaf_model):
    # Worked example, by hand: y = 2 + 3a exactly, b irrelevant. The tree-wide running
    # statistics of y are those of a under y = 2 + 3a (mean_y = 2 + 3 mean_a, sd_y = 3 sd_a
    # on every prefix), so the standardised target equals z_a on every record and least
    # mean squares converges to w_a = 1, w_b = 0, b = 0 whatever the leaf. In original
    # units: coefficient sd_y w_a / sd_a = 3, intercept mean_y - 3 mean_a = 2.
    X, y = _linear_example()
    model = TreeRegressor(["a", "b"], ["numeric", "numeric"],
                          RegressionSettings(leaf_model=leaf_model))
    scored = model.learn(X, y)
    late = np.abs(scored.pred[-1000:] - y[-1000:])
    assert late.max() < 1e-3 * y.std()
    for leaf, c in leaf_consequents(model, max_terms=1).items():
        assert c.model == "linear"
        assert format_consequent("y", c) == "y = 2 + 3 * a"
        intercept, terms = linear_formula(model, leaf)
        assert intercept == pytest.approx(2.0, abs=1e-3)
        assert dict(terms)["a"] == pytest.approx(3.0, abs=1e-4)
        assert abs(dict(terms)["b"]) < 1e-4
    with pytest.raises(ValueError, match="is a branch"):
        leaf_consequent(model, 0)


def test_short_formula_holds_omitted_inputs_at_their_leaf_mean():
    # by hand: dropping term j from y = i + sum_j c_j x_j while holding x_j at its mean m_j
    # among the leaf's records moves c_j m_j into the intercept
    rng = np.random.default_rng(12)
    X = rng.uniform(0.0, 1.0, (4000, 2))
    y = 1.0 + 2.0 * X[:, 0] + 0.3 * X[:, 1] + np.where(X[:, 0] > 0.5, 1.0, 0.0)
    model = TreeRegressor(["a", "b"], ["numeric"] * 2,
                          RegressionSettings(leaf_model="linear", max_depth=1))
    model.learn(X, y)
    leaves = model.predict(X).leaf
    for leaf, c in leaf_consequents(model, max_terms=1).items():
        intercept, terms = linear_formula(model, leaf)
        coef = dict(terms)
        assert c.terms == (("a", coef["a"]),) and c.omitted == 1
        learned = (leaves == leaf) & (np.arange(4000) >= model.tables_.node_i[leaf, CREATED])
        assert c.intercept == pytest.approx(intercept + coef["b"] * X[learned, 1].mean(),
                                            rel=1e-9)


def test_missing_input_counts_as_its_leaf_mean_in_linear_leaves():
    # by hand: the linear model y = mean_y + sd_y (b + sum_j w_j (x_j - mean_j) / sd_j)
    # evaluated with the missing input replaced by its mean among the leaf's records
    rng = np.random.default_rng(13)
    X = rng.uniform(0.0, 1.0, (3000, 2))
    y = 3.0 * X[:, 0] - 2.0 * X[:, 1]
    model = TreeRegressor(["a", "b"], ["numeric"] * 2, RegressionSettings(leaf_model="linear"))
    model.learn(X, y)
    t = model.tables_
    p = t.lin.shape[1] - 1
    probe = np.array([[0.2, np.nan], [np.nan, 0.7]])
    scored = model.predict(probe)
    for row, leaf, pred in zip(probe, scored.leaf, scored.pred):
        filled = np.where(np.isnan(row), t.lin_x[leaf, :, 1], row)
        z = (filled - t.scale[:p, SC_MEAN]) / t.scale[:p, SC_SD]
        by_hand = t.scale[p, SC_MEAN] + t.scale[p, SC_SD] * (t.lin[leaf, p] + t.lin[leaf, :p] @ z)
        assert pred == pytest.approx(by_hand, rel=1e-12)


def _satisfies(conditions, record, names, categories) -> bool:
    for c in conditions:
        v = record[names.index(c.feature)]
        if np.isnan(v):
            if not c.missing:
                return False
        elif c.op in ("<=", ">"):
            if (v <= c.value) != (c.op == "<="):
                return False
        else:
            labels = categories.get(c.feature, [])
            label = labels[int(v)] if int(v) < len(labels) else f"#{int(v)}"
            if (label in c.value) != (c.op == "in"):
                return False
    return True


def test_rule_conditions_partition_the_inputs():
    # by hand: every record, missing values and late categories included, satisfies the
    # conditions of exactly one rule, the one whose leaf scores it
    X, y = _mixed_stream(6000, 5)
    model = TreeRegressor(NAMES, KINDS, RegressionSettings(grace_period=100))
    model.learn(X, y)
    categories = {"mode": ["idle", "cool", "defrost"]}    # codes 3, 4 shown as #3, #4
    rules = {leaf: node_conditions(model, leaf, categories) for leaf in leaf_consequents(model)}
    assert len(rules) == model.n_leaves > 4
    probe = np.vstack([X[::40], [[np.nan, np.nan, np.nan], [0.1, 7.0, np.nan]]])
    for record, leaf in zip(probe, model.predict(probe).leaf):
        matches = [n for n, conds in rules.items() if _satisfies(conds, record, NAMES, categories)]
        assert matches == [int(leaf)]


def test_mean_leaves_have_no_formula():
    X, y = _linear_example(1000)
    model = TreeRegressor(["a", "b"], ["numeric"] * 2, RegressionSettings(leaf_model="mean"))
    model.learn(X, y)
    c = leaf_consequents(model)[next(iter(leaf_consequents(model)))]
    assert c.model == "mean" and c.intercept is None and c.terms == ()
    assert format_consequent("y", c).startswith("y = ") and "+-" in format_consequent("y", c)


# ================================================================ outside checks

@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_root_split_matches_scikit_learn(seed):
    # source: scikit-learn DecisionTreeRegressor(max_depth=1) (exhaustive CART split,
    # squared error) on the records the root had seen when it split, river's Friedman #1.
    # Tolerance: our thresholds are quantile edges of the first 4 x bins values, about
    # 1/bins of the feature's range apart; we allow 1.5 bin widths, and require the
    # variance reduction of our split to be within 5 % of scikit-learn's optimum.
    from sklearn.tree import DecisionTreeRegressor
    s = friedman(3000, seed)
    settings = RegressionSettings(max_depth=1, leaf_model="mean")
    model = TreeRegressor(s.names, s.kinds, settings)
    model.learn(s.X, s.y)
    t = model.tables_
    assert model.n_nodes == 3 and t.node_i[0, KIND] == NUMERIC
    seen = int(t.node_i[1, CREATED])
    X, y = s.X[:seen], s.y[:seen]
    reference = DecisionTreeRegressor(max_depth=1).fit(X, y).tree_
    feature, threshold = int(t.node_i[0, FEATURE]), float(t.node_f[0, THRESHOLD])
    assert feature == reference.feature[0]
    span = X[:, feature].max() - X[:, feature].min()
    assert abs(threshold - reference.threshold[0]) <= 1.5 * span / settings.bins

    def reduction(f, thr):
        left, right = y[X[:, f] <= thr], y[X[:, f] > thr]
        return y.var() * len(y) - left.var() * len(left) - right.var() * len(right)
    assert reduction(feature, threshold) >= 0.95 * reduction(feature, reference.threshold[0])


@pytest.mark.slow
def test_friedman_rmse_not_worse_than_river_same_leaf_model():
    # source: river 0.26.1 HoeffdingTreeRegressor, default leaf_prediction "adaptive"
    # (linear models), against sapwood's default adaptive leaves; river's Friedman #1,
    # 200k records, prequential, same run. tests/README.md: river's RMSE 2.048 at 100k.
    s = friedman(200_000, 42)
    result = compare_with_river(s, RegressionSettings())
    print({k: result[k] for k in ("speed_ratio",)}, result["sapwood"], result["river"])
    assert result["sapwood"]["rmse"] <= result["river"]["rmse"]


@pytest.mark.slow
@pytest.mark.parametrize("leaf_model", ["mean", "linear"])
def test_friedman_rmse_other_leaf_models(leaf_model):
    # source: river 0.26.1 HoeffdingTreeRegressor(leaf_prediction "mean" / "model"),
    # river's Friedman #1, prequential, same run; 100k records to keep the suite short
    # (measured at 200k: mean 2.254 vs river 2.406, linear 1.829 vs 1.931; below 50k
    # river's tree, which grows faster early, is level with or ahead of sapwood's)
    s = friedman(100_000, 7)
    settings = RegressionSettings(leaf_model=leaf_model)
    ours = run_sapwood(s, settings)
    theirs = run_river(s, river_counterpart(settings))
    assert ours["rmse"] <= theirs["rmse"]


@pytest.mark.slow
@pytest.mark.parametrize("drift", ["lea", "gra"])
def test_friedman_drift_against_adaptive_tree(drift):
    # source: river 0.26.1 HoeffdingAdaptiveTreeRegressor (ADWIN per node, seed 42; its
    # default leaf model "adaptive", as sapwood's) on river's FriedmanDrift (Ikonomovska
    # et al. 2011): "lea" local expanding abrupt drift, "gra" global recurring abrupt
    # drift; 60k records, drift points scaled to the length, prequential, same run.
    # Measured with sapwood's default ADWIN at every node: lea 2.426 vs river 2.696,
    # gra 2.284 vs 2.558 (without drift detection sapwood scored lea 2.570, gra 2.826).
    s = friedman_drift(60_000, 42, drift)
    ours = run_sapwood(s, RegressionSettings())
    theirs = run_river(s, river_counterpart(RegressionSettings(), adaptive=True))
    assert ours["rmse"] <= theirs["rmse"]


def test_wide_friedman_follows_the_published_formula():
    # source: Friedman (1991) #1: y = 10 sin(pi x0 x1) + 20 (x2 - 0.5)^2 + 10 x3 + 5 x4
    # + N(0, 1); the other inputs are irrelevant
    s = wide_friedman(20_000, 3, n_features=30)
    X = s.X
    signal = (10 * np.sin(np.pi * X[:, 0] * X[:, 1]) + 20 * (X[:, 2] - 0.5) ** 2
              + 10 * X[:, 3] + 5 * X[:, 4])
    noise = s.y - signal
    assert X.shape == (20_000, 30) and X.min() >= 0.0 and X.max() < 1.0
    assert abs(noise.mean()) < 0.03 and abs(noise.std() - 1.0) < 0.03
    assert max(abs(np.corrcoef(X[:, k], noise)[0, 1]) for k in range(30)) < 0.03


def test_friedman_arrays_match_river_records():
    # source: river 0.26.1 synth.Friedman(seed=42): its first record (river's docstring)
    s = friedman(5, 42)
    assert s.names[:2] == ["x0", "x1"] and s.X.shape == (5, 10)
    assert s.X[0, 0] == pytest.approx(0.6394, abs=1e-4) and s.y[0] == pytest.approx(7.6612,
                                                                                      abs=1e-4)
