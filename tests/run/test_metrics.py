"""Prequential metrics (stream/metrics.py) against river 0.26.1, scikit-learn, published
formulas and hand-derived examples; plus batch-size independence and checkpoint round trips.

Every numeric call into sapwood runs under ``np.errstate(all="raise")`` (autouse fixture).
"""

from __future__ import annotations

import io
import json
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st
from river import dummy, metrics as rm, utils as ru
from sklearn import metrics as skm

from stream.errors import ConfigError, ModelFileError
from stream.run.metrics import (CLASSIFICATION_ROW, REGRESSION_ROW, ClassificationScore,
                                RegressionScore)

HEADLINE_C = CLASSIFICATION_ROW[1:]
HEADLINE_R = REGRESSION_ROW[1:]


@pytest.fixture(autouse=True)
def _raise_on_float_errors():
    with np.errstate(all="raise"):
        yield


def _codes(values):
    return np.asarray(values, dtype=np.int32)


def _first_appearance(codes: np.ndarray) -> np.ndarray:
    """Recode so class codes follow the order of first appearance among the true labels.

    river's PriorClassifier breaks majority ties by first appearance; sapwood by lowest
    code. Under this coding both rules pick the same class.
    """
    order = {}
    for c in codes.tolist():
        order.setdefault(c, len(order))
    return np.array([order[c] for c in codes.tolist()], dtype=np.int32), order


def _class_stream(seed: int, n: int, k: int, predicted_only: bool = False):
    """Seeded true/predicted codes: skewed classes, a 60 % correct predictor."""
    rng = np.random.default_rng(seed)
    k_true = k - 1 if predicted_only else k
    prior = rng.dirichlet(np.ones(k_true))
    y = rng.choice(k_true, size=n, p=prior)
    y, order = _first_appearance(y)
    noise = rng.integers(0, k, size=n)
    pred = np.where(rng.random(n) < 0.6, y, noise).astype(np.int32)
    return y, pred


def _close(ours, ref, rel=1e-9):
    """river reports 0.0 where a ratio is undefined; sapwood reports None."""
    if ours is None:
        return ref == 0.0
    return ours == pytest.approx(ref, rel=rel, abs=1e-12)


def _all_rows(score, *batch_args_list):
    rows = []
    for args in batch_args_list:
        rows.extend(score.update(*args))
    return rows


# ----------------------------------------------------------------------------- settings

@pytest.mark.parametrize("kwargs, message", [
    ({"window": 0}, "window must be a whole number >= 1, got 0"),
    ({"fading": 1.5}, "fading factor must be a number in (0, 1], got 1.5"),
    ({"fading": 0}, "fading factor must be a number in (0, 1], got 0"),
    ({"log_every": -1}, "log interval must be a whole number >= 0, got -1"),
])
@pytest.mark.parametrize("cls", [ClassificationScore, RegressionScore])
def test_settings_use_the_message_template(cls, kwargs, message):
    with pytest.raises(ConfigError) as info:
        cls(**kwargs)
    assert str(info.value) == message


# ------------------------------------------------------------------ published check values

def test_kappa_check_value_from_references():
    # tests/README.md, measured with river.metrics.CohenKappa (river 0.26.1): 0.428571.
    labels = ["ant", "bird", "cat"]
    y_true = ["cat", "ant", "cat", "cat", "ant", "bird"]
    y_pred = ["ant", "ant", "cat", "cat", "ant", "cat"]
    score = ClassificationScore()
    score.update(_codes([labels.index(v) for v in y_true]),
                 _codes([labels.index(v) for v in y_pred]), 3)
    result = score.result(labels)
    assert result["kappa"] == pytest.approx(0.428571, abs=5e-7)
    river_kappa = rm.CohenKappa()
    for t, p in zip(y_true, y_pred):
        river_kappa.update(t, p)
    assert result["kappa"] == pytest.approx(river_kappa.get(), rel=1e-12)
    # By hand: p0 = 4/6; true counts ant 2, bird 1, cat 3; predicted ant 3, bird 0, cat 3;
    # pc = (2*3 + 1*0 + 3*3) / 36 = 15/36; kappa = (24/36 - 15/36) / (21/36) = 9/21.
    assert result["kappa"] == pytest.approx(9 / 21, rel=1e-12)


def test_kappa_m_worked_example_by_hand():
    # kappa-M (Bifet et al., KDD 2015): (p0 - pm) / (1 - pm), pm the prequential accuracy
    # of the majority-class predictor. Derived by hand for the stream above with codes
    # ant=0, bird=1, cat=2: y = [2, 0, 2, 2, 0, 1], pred = [0, 0, 2, 2, 0, 2].
    #   record 1: no history, tie -> lowest code 0 (ant); true cat -> miss. counts cat 1
    #   record 2: majority cat; true ant -> miss.                      counts ant 1, cat 1
    #   record 3: tie ant/cat -> ant (lower code); true cat -> miss.   counts ant 1, cat 2
    #   record 4: cat; true cat -> hit.                                counts ant 1, cat 3
    #   record 5: cat; true ant -> miss.                               counts ant 2, cat 3
    #   record 6: cat; true bird -> miss.
    # pm = 1/6, p0 = 4/6 -> kappa-M = (4/6 - 1/6) / (5/6) = 3/5.
    # Window of the last 4 records (3..6): p0 = 3/4, pm = 1/4 -> (3/4 - 1/4) / (3/4) = 2/3.
    score = ClassificationScore(window=4)
    score.update(_codes([2, 0, 2, 2, 0, 1]), _codes([0, 0, 2, 2, 0, 2]), 3)
    result = score.result(["ant", "bird", "cat"])
    assert result["kappa_m"] == pytest.approx(3 / 5, rel=1e-12)
    assert result["window_kappa_m"] == pytest.approx(2 / 3, rel=1e-12)
    # Same stream coded in order of first appearance (cat=0, ant=1, bird=2): record 1 is
    # now a hit (empty history -> code 0 = cat) and record 3's tie goes to cat, a hit:
    # pm = 3/6 -> kappa-M = (4/6 - 3/6) / (3/6) = 1/3.
    score = ClassificationScore()
    score.update(_codes([0, 1, 0, 0, 1, 2]), _codes([1, 1, 0, 0, 1, 0]), 3)
    assert score.result(["cat", "ant", "bird"])["kappa_m"] == pytest.approx(1 / 3, rel=1e-12)


def test_fading_accuracy_check_value():
    # Gama, Sebastiao & Rodrigues (Machine Learning 2013): S_i = L_i + a S_{i-1},
    # N_i = 1 + a N_{i-1}; 1000 misses then 1000 hits, a = 0.999 -> 1 / (1 + 0.999^1000)
    # = 0.731157 (computed; tests/README.md).
    y = np.zeros(2000, dtype=np.int32)
    pred = np.r_[np.ones(1000), np.zeros(1000)].astype(np.int32)
    score = ClassificationScore(fading=0.999)
    score.update(y, pred, 2)
    fading = score.result(["a", "b"])["fading_accuracy"]
    assert fading == pytest.approx(0.731157, abs=5e-7)
    assert fading == pytest.approx(1 / (1 + 0.999 ** 1000), rel=1e-12)


def test_fading_mae_follows_the_published_recursion():
    # Gama et al. 2013 recursion, evaluated here in plain Python as the reference.
    rng = np.random.default_rng(7)
    y, pred = rng.normal(size=500), rng.normal(size=500)
    s = n = 0.0
    for loss in np.abs(y - pred).tolist():
        s, n = loss + 0.99 * s, 1 + 0.99 * n
    score = RegressionScore(fading=0.99)
    score.update(y, pred)
    assert score.result()["fading_mae"] == pytest.approx(s / n, rel=1e-12)


# ------------------------------------------------------------ classification against river

@pytest.mark.parametrize("seed, k, window, predicted_only", [
    (1, 2, 50, False), (2, 5, 120, False), (3, 4, 80, True)])
def test_classification_rows_match_river_record_by_record(seed, k, window, predicted_only):
    # river.metrics Accuracy / CohenKappa / BalancedAccuracy and river.utils.Rolling of
    # each (river 0.26.1); the majority-class predictor of kappa-M is river.dummy.
    # PriorClassifier, whose empty-history answer (None) is replaced by code 0, sapwood's
    # documented rule for that case.
    y, pred = _class_stream(seed, 1500, k, predicted_only)
    score = ClassificationScore(window=window, log_every=1)
    rows = _all_rows(score, (y[:700], pred[:700], k), (y[700:], pred[700:], k))
    assert [r["records"] for r in rows] == list(range(1, 1501))

    acc, kappa, bal = rm.Accuracy(), rm.CohenKappa(), rm.BalancedAccuracy()
    wacc = ru.Rolling(rm.Accuracy, window_size=window)
    wkappa = ru.Rolling(rm.CohenKappa, window_size=window)
    wbal = ru.Rolling(rm.BalancedAccuracy, window_size=window)
    prior = dummy.PriorClassifier()
    maj_acc, wmaj_acc = rm.Accuracy(), ru.Rolling(rm.Accuracy, window_size=window)
    for t, p, row in zip(y.tolist(), pred.tolist(), rows):
        m = prior.predict_one({})
        m = 0 if m is None else m
        prior.learn_one({}, t)
        for metric in (acc, kappa, bal, wacc, wkappa, wbal):
            metric.update(t, p)
        maj_acc.update(t, m)
        wmaj_acc.update(t, m)
        assert _close(row["accuracy"], acc.get())
        assert _close(row["kappa"], kappa.get())
        assert _close(row["balanced_accuracy"], bal.get())
        assert _close(row["window_accuracy"], wacc.get())
        assert _close(row["window_kappa"], wkappa.get())
        assert _close(row["window_balanced_accuracy"], wbal.get())
        for key, p0, pm in (("kappa_m", acc.get(), maj_acc.get()),
                            ("window_kappa_m", wacc.get(), wmaj_acc.get())):
            if pm == 1.0:
                assert row[key] is None
            else:
                assert row[key] == pytest.approx((p0 - pm) / (1 - pm), rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("seed, k, window", [(11, 3, 60), (12, 6, 200)])
def test_per_class_and_confusion_match_river(seed, k, window):
    # river.metrics.Precision / Recall / F1 on labels binarized per class, and
    # river.metrics.ConfusionMatrix, cumulative and under river.utils.Rolling.
    y, pred = _class_stream(seed, 900, k, predicted_only=True)
    labels = [f"c{j}" for j in range(k)]
    score = ClassificationScore(window=window)
    cum = {j: (rm.Precision(), rm.Recall(), rm.F1()) for j in range(k)}
    win = {j: tuple(ru.Rolling(cls, window_size=window) for cls in (rm.Precision, rm.Recall,
                                                                  rm.F1)) for j in range(k)}
    cm, wcm = rm.ConfusionMatrix(), ru.Rolling(rm.ConfusionMatrix, window_size=window)
    for start in range(0, 900, 150):
        stop = start + 150
        score.update(y[start:stop], pred[start:stop], k)
        for t, p in zip(y[start:stop].tolist(), pred[start:stop].tolist()):
            cm.update(t, p)
            wcm.update(t, p)
            for j in range(k):
                for metric in cum[j] + win[j]:
                    metric.update(t == j, p == j)
        result = score.result(labels)
        for prefix, refs, river_cm in (("", cum, cm), ("window_", win, wcm)):
            matrix = result[prefix + "confusion"]["matrix"]
            assert matrix == [[int(river_cm[i][j]) for j in range(k)] for i in range(k)]
            for j, label in enumerate(labels):
                got = result[prefix + "per_class"][label]
                for key, metric in zip(("precision", "recall", "f1"), refs[j]):
                    assert _close(got[key], metric.get()), (prefix, label, key)
                assert got["support"] == sum(matrix[j])


def test_end_of_stream_matches_scikit_learn():
    # scikit-learn batch metrics on the whole stream: cohen_kappa_score,
    # balanced_accuracy_score, precision_recall_fscore_support, confusion_matrix.
    k = 5
    y, pred = _class_stream(21, 3000, k, predicted_only=True)
    score = ClassificationScore()
    score.update(y, pred, k)
    labels = list("abcde")
    result = score.result(labels)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")  # sklearn warns about the predicted-only class
        assert result["kappa"] == pytest.approx(skm.cohen_kappa_score(y, pred), rel=1e-9)
        assert result["balanced_accuracy"] == pytest.approx(
            skm.balanced_accuracy_score(y, pred), rel=1e-12)
        p, r, f, s = skm.precision_recall_fscore_support(y, pred, labels=range(k),
                                                         zero_division=np.nan)
        matrix = skm.confusion_matrix(y, pred, labels=range(k))
    assert result["confusion"]["matrix"] == matrix.tolist()
    for j, label in enumerate(labels):
        got = result["per_class"][label]
        for key, ref in (("precision", p[j]), ("recall", r[j]), ("f1", f[j])):
            if np.isnan(ref):
                assert got[key] is None
            else:
                assert got[key] == pytest.approx(ref, rel=1e-12)
        assert got["support"] == s[j]


def test_classes_can_grow_between_batches():
    # river.metrics.ConfusionMatrix / CohenKappa as the reference once all classes exist.
    y = _codes([0, 1, 0, 1, 2, 2, 3, 0])
    pred = _codes([0, 0, 1, 1, 2, 3, 3, 0])
    score = ClassificationScore()
    score.update(y[:4], pred[:4], 2)
    score.update(y[4:], pred[4:], np.int64(4))  # numpy ints are accepted as counts
    result = score.result(["a", "b", "c", "d"])
    kappa, cm = rm.CohenKappa(), rm.ConfusionMatrix()
    for t, p in zip(y.tolist(), pred.tolist()):
        kappa.update(t, p)
        cm.update(t, p)
    assert result["kappa"] == pytest.approx(kappa.get(), rel=1e-12)
    assert result["confusion"]["matrix"] == [[int(cm[i][j]) for j in range(4)]
                                             for i in range(4)]


# ---------------------------------------------------------------- regression against river

@pytest.mark.parametrize("seed, window", [(31, 40), (32, 300)])
def test_regression_rows_match_river_record_by_record(seed, window):
    # river.metrics MAE / RMSE / R2 and river.utils.Rolling of each (river 0.26.1).
    rng = np.random.default_rng(seed)
    y = 50 + 10 * rng.standard_normal(1200)
    pred = y + rng.normal(0, 4, size=1200)
    score = RegressionScore(window=window, log_every=1)
    rows = _all_rows(score, (y[:333], pred[:333]), (y[333:], pred[333:]))
    refs = {key: cls() for key, cls in (("mae", rm.MAE), ("rmse", rm.RMSE), ("r2", rm.R2))}
    refs.update({f"window_{key}": ru.Rolling(cls, window_size=window)
                 for key, cls in (("mae", rm.MAE), ("rmse", rm.RMSE), ("r2", rm.R2))})
    for t, p, row in zip(y.tolist(), pred.tolist(), rows):
        for key, metric in refs.items():
            metric.update(t, p)
            # river's rolling R2 reverts a running variance; allow for its rounding.
            assert _close(row[key], metric.get(), rel=1e-7), (row["records"], key)


def test_windowed_regression_has_no_residue_after_a_spike_leaves():
    # Arithmetic (common practice): once a huge error has left the window, the window holds
    # only unit errors, so MAE = RMSE = 1 exactly. Adding and subtracting running sums
    # would leave the spike's rounding residue behind (1e24 + 1 == 1e24 in float64).
    y = np.zeros(101)
    pred = np.r_[1e12, np.ones(100)]
    score = RegressionScore(window=10)
    score.update(y, pred)
    result = score.result()
    assert result["window_mae"] == 1.0 and result["window_rmse"] == 1.0


# ------------------------------------------------------------------ undefined and empty

def test_empty_stream_gives_a_defined_result():
    c = ClassificationScore(log_every=5)
    assert c.update(_codes([]), _codes([]), 2) == []
    result = c.result(["ok", "fault"])
    json.dumps(result, allow_nan=False)
    assert result["records"] == 0 and result["window_records"] == 0
    assert all(result[key] is None for key in HEADLINE_C)
    assert result["confusion"] == {"labels": ["ok", "fault"], "matrix": [[0, 0], [0, 0]]}
    assert result["per_class"]["ok"] == {"precision": None, "recall": None, "f1": None,
                                         "support": 0}
    r = RegressionScore(log_every=5)
    assert r.update(np.array([]), np.array([])) == []
    result = r.result()
    json.dumps(result, allow_nan=False)
    assert result["records"] == 0 and all(result[key] is None for key in HEADLINE_R)


def test_undefined_ratios_are_none_not_nan():
    # kappa with pc == 1 and kappa-M with pm == 1 are 0/0 (Cohen 1960 formula);
    # river.metrics.CohenKappa reports 0.0 there instead.
    score = ClassificationScore(log_every=3)
    rows = score.update(_codes([0, 0, 0]), _codes([0, 0, 0]), 2)
    assert rows[0]["accuracy"] == 1.0
    assert rows[0]["kappa"] is None and rows[0]["kappa_m"] is None
    result = score.result(["a", "b"])
    assert result["per_class"]["b"] == {"precision": None, "recall": None, "f1": None,
                                        "support": 0}
    json.dumps(result, allow_nan=False)
    # R^2 with constant targets: SST = 0 (river.metrics.R2 reports 0.0 there).
    reg = RegressionScore()
    reg.update(np.full(5, 3.0), np.arange(5.0))
    assert reg.result()["r2"] is None and reg.result()["window_r2"] is None


def test_class_never_predicted_has_no_precision_but_an_f1():
    # F1 = 2 tp / (2 tp + fp + fn) (van Rijsbergen's F-measure, common practice): a class
    # with support that is never predicted has recall 0 and F1 0; precision is undefined.
    score = ClassificationScore()
    score.update(_codes([0, 1, 1]), _codes([0, 0, 0]), 2)
    got = score.result(["a", "b"])["per_class"]["b"]
    assert got == {"precision": None, "recall": 0.0, "f1": 0.0, "support": 2}


# ------------------------------------------------------------------------- log rows

def test_log_rows_land_exactly_on_multiples_and_equal_a_prefix_result():
    # Record-at-a-time semantics: a row at record r equals the result of a scorer fed
    # exactly the first r records.
    y, pred = _class_stream(41, 200, 3)
    score = ClassificationScore(window=13, log_every=7)
    rows, start = [], 0
    for size in (1, 6, 7, 20, 3, 50, 113):
        rows += score.update(y[start:start + size], pred[start:start + size], 3)
        start += size
    assert [r["records"] for r in rows] == list(range(7, 201, 7))
    for row in rows:
        prefix = ClassificationScore(window=13)
        prefix.update(y[:row["records"]], pred[:row["records"]], 3)
        result = prefix.result(["a", "b", "c"])
        assert row == {key: result[key] for key in CLASSIFICATION_ROW}

    rng = np.random.default_rng(42)
    yr, pr = rng.normal(size=90), rng.normal(size=90)
    reg = RegressionScore(window=8, log_every=30)
    rows = reg.update(yr[:29], pr[:29]) + reg.update(yr[29:31], pr[29:31]) + reg.update(
        yr[31:], pr[31:])
    assert [r["records"] for r in rows] == [30, 60, 90]
    for row in rows:
        prefix = RegressionScore(window=8)
        prefix.update(yr[:row["records"]], pr[:row["records"]])
        result = prefix.result()
        assert row == {key: result[key] for key in REGRESSION_ROW}


# ------------------------------------------------- batch independence and state (property)

def _cut(n: int, cuts: list[int]) -> list[tuple[int, int]]:
    points = sorted({0, n, *[c % (n + 1) for c in cuts]})
    return list(zip(points[:-1], points[1:]))


def _feed_classification(score, y, pred, spans):
    rows, k = [], 1
    for a, b in spans:
        if b > a:  # empty batches are covered by test_empty_stream_gives_a_defined_result
            k = max(k, int(max(y[a:b].max(), pred[a:b].max())) + 1)
            rows += score.update(y[a:b], pred[a:b], k)
    return rows


def _same_state(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(
        np.array_equal(a[key], b[key]) if isinstance(a[key], np.ndarray) else a[key] == b[key]
        for key in a)


class_streams = st.integers(0, 250).flatmap(lambda n: st.tuples(
    st.lists(st.integers(0, 4), min_size=n, max_size=n),
    st.lists(st.integers(0, 4), min_size=n, max_size=n)))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(stream=class_streams, cuts=st.lists(st.integers(0, 300), max_size=12),
       window=st.integers(1, 40), log_every=st.integers(0, 15),
       fading=st.sampled_from([1.0, 0.99, 0.5]))
def test_classification_is_independent_of_batching(stream, cuts, window, log_every, fading):
    y, pred = (np.array(v, dtype=np.int32) for v in stream)
    n = y.shape[0]
    k = int(max(y.max(initial=0), pred.max(initial=0))) + 1
    labels = [str(j) for j in range(5)]
    make = lambda: ClassificationScore(window=window, fading=fading, log_every=log_every)
    one, many, single = make(), make(), make()
    rows_one = _feed_classification(one, y, pred, [(0, n)])
    rows_many = _feed_classification(many, y, pred, _cut(n, cuts))
    rows_single = _feed_classification(single, y, pred, [(i, i + 1) for i in range(n)])
    y_before, pred_before = y.copy(), pred.copy()
    assert rows_one == rows_many == rows_single
    assert one.result(labels) == many.result(labels) == single.result(labels)
    assert _same_state(one.state_dict(), many.state_dict())
    assert np.array_equal(y, y_before) and np.array_equal(pred, pred_before)  # not mutated
    assert len(rows_one) == (n // log_every if log_every else 0)
    if n:
        assert one.result(labels)["records"] == n and one.n_classes_ == k


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(0, 250), seed=st.integers(0, 2**32 - 1),
       cuts=st.lists(st.integers(0, 300), max_size=12), window=st.integers(1, 40),
       log_every=st.integers(0, 15))
def test_regression_is_independent_of_batching(n, seed, cuts, window, log_every):
    rng = np.random.default_rng(seed)
    y = rng.normal(size=n) * 10.0 ** rng.integers(-3, 4)
    pred = y + rng.normal(size=n)
    make = lambda: RegressionScore(window=window, log_every=log_every)
    one, many, single = make(), make(), make()
    rows_one = one.update(y, pred)
    rows_many = [r for a, b in _cut(n, cuts) for r in many.update(y[a:b], pred[a:b])]
    rows_single = [r for i in range(n) for r in single.update(y[i:i + 1], pred[i:i + 1])]
    assert rows_one == rows_many == rows_single
    assert one.result() == many.result() == single.result()
    assert _same_state(one.state_dict(), single.state_dict())


def _through_npz(state: dict) -> dict:
    """Save to .npz and load back with pickle disabled, as a checkpoint would."""
    buffer = io.BytesIO()
    np.savez(buffer, **state)
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as data:
        return {key: data[key] for key in data.files}


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(stream=class_streams, split=st.integers(0, 300), window=st.integers(1, 40),
       log_every=st.integers(0, 9))
def test_classification_state_round_trip(stream, split, window, log_every):
    y, pred = (np.array(v, dtype=np.int32) for v in stream)
    n = y.shape[0]
    split = split % (n + 1)
    labels = [str(j) for j in range(5)]
    whole = ClassificationScore(window=window, fading=0.9, log_every=log_every)
    rows_whole = _feed_classification(whole, y, pred, [(0, split), (split, n)])
    first = ClassificationScore(window=window, fading=0.9, log_every=log_every)
    rows = _feed_classification(first, y, pred, [(0, split)])
    resumed = ClassificationScore.from_state(_through_npz(first.state_dict()))
    k = max(1, first.n_classes_)
    if n > split:
        k = max(k, int(max(y[split:].max(), pred[split:].max())) + 1)
    if n > split:
        rows += resumed.update(y[split:], pred[split:], k)
    assert rows == rows_whole
    assert resumed.result(labels) == whole.result(labels)
    assert _same_state(resumed.state_dict(), whole.state_dict())


@settings(max_examples=40, deadline=None)
@given(n=st.integers(0, 200), split=st.integers(0, 300), seed=st.integers(0, 2**32 - 1),
       window=st.integers(1, 40))
def test_regression_state_round_trip(n, split, seed, window):
    rng = np.random.default_rng(seed)
    y, pred = rng.normal(size=n), rng.normal(size=n)
    split = split % (n + 1)
    whole = RegressionScore(window=window, fading=0.9, log_every=4)
    rows_whole = whole.update(y, pred)
    first = RegressionScore(window=window, fading=0.9, log_every=4)
    rows = first.update(y[:split], pred[:split])
    resumed = RegressionScore.from_state(_through_npz(first.state_dict()))
    rows += resumed.update(y[split:], pred[split:])
    assert rows == rows_whole and resumed.result() == whole.result()


def test_state_is_a_copy_and_json_friendly_scalars():
    score = ClassificationScore(window=3)
    score.update(_codes([0, 1]), _codes([1, 1]), 2)
    state = score.state_dict()
    score.update(_codes([1]), _codes([1]), 2)
    assert state["records"] == 2 and state["confusion"].sum() == 2
    scalars = {key: value for key, value in state.items() if not isinstance(value, np.ndarray)}
    json.dumps(scalars, allow_nan=False)


def test_corrupt_or_foreign_state_is_refused():
    score = ClassificationScore(window=3)
    score.update(_codes([0, 1]), _codes([1, 1]), 2)
    state = score.state_dict()
    with pytest.raises(ModelFileError, match="expected 'classification_score'"):
        ClassificationScore.from_state({**state, "kind": "regression_score"})
    with pytest.raises(ModelFileError, match="field 'confusion' is missing"):
        ClassificationScore.from_state({k: v for k, v in state.items() if k != "confusion"})
    with pytest.raises(ModelFileError, match="do not agree"):
        ClassificationScore.from_state({**state, "records": 5})
    with pytest.raises(ModelFileError, match="field 'ring_true' has shape"):
        ClassificationScore.from_state({**state, "ring_true": np.zeros(4, np.int32)})
    with pytest.raises(ModelFileError, match="expected 'regression_score'"):
        RegressionScore.from_state(state)


# ------------------------------------------------------------------------ bad input

def test_bad_input_names_the_record_and_value():
    score = ClassificationScore()
    score.update(_codes([0, 1]), _codes([0, 1]), 2)
    with pytest.raises(ValueError, match=r"^record 4: true class code 5 is outside 0\.\.2$"):
        score.update(_codes([1, 5]), _codes([0, 0]), 3)
    with pytest.raises(ValueError, match="must be 1-D arrays of the same length"):
        score.update(_codes([1, 0]), _codes([0]), 3)
    with pytest.raises(ValueError, match="class codes must be integers"):
        score.update(np.array([0.0]), _codes([0]), 3)
    assert score.records == 2  # a refused batch leaves the state untouched
    reg = RegressionScore()
    with pytest.raises(ValueError, match=r"^record 2: prediction nan is not a finite number$"):
        reg.update(np.array([1.0, 2.0]), np.array([1.0, np.nan]))
    assert reg.records == 0


# ----------------------------------------------------------------- the class of concern

def _sk_focus(y, pred, concern):
    """precision, recall, F1 of one class by scikit-learn (zero_division -> None)."""
    if not (y == concern).any() and not (pred == concern).any():
        return None, None, None
    p, r, f, _ = skm.precision_recall_fscore_support(y, pred, labels=[concern],
                                                     zero_division=np.nan)
    as_none = [None if np.isnan(v) else float(v) for v in (p[0], r[0], f[0])]
    return tuple(as_none)


@pytest.mark.parametrize("seed", [3, 11])
def test_concern_is_the_rarest_class_at_exactly_the_1000th_label(seed):
    """The rarest class among the first 1,000 labels, whatever the batches; its columns
    in log rows equal scikit-learn's precision/recall/F1 at the same records (cumulative)
    and over the window's records."""
    y, pred = _class_stream(seed, 6_000, 4)
    first = np.bincount(y[:1000], minlength=4)
    seen = np.flatnonzero(first)
    rarest = int(seen[np.argmin(first[seen])])
    results = []
    for cuts in ([6_000], [999, 2, 4_999], [1, 1_500, 4_499], list(np.full(60, 100))):
        score = ClassificationScore(window=500, log_every=250)
        rows, at = [], 0
        for size in cuts:
            rows += score.update(y[at:at + size], pred[at:at + size], 4)
            at += size
        assert score.concern == rarest
        results.append((rows, score.result(["a", "b", "c", "d"])))
    assert all(r == results[0] for r in results[1:])
    rows, result = results[0]
    assert result["concern"] == "abcd"[rarest]
    for row in rows:
        n = row["records"]
        got = (row["concern_precision"], row["concern_recall"], row["concern_f1"])
        if n < 1000:
            assert got == (None, None, None)
            continue
        want = _sk_focus(y[:n], pred[:n], rarest)
        assert got == pytest.approx(want, abs=1e-12)
        window = slice(n - 500, n)
        got_w = (row["window_concern_precision"], row["window_concern_recall"],
                 row["window_concern_f1"])
        assert got_w == pytest.approx(_sk_focus(y[window], pred[window], rarest), abs=1e-12)


def test_a_declared_concern_counts_from_its_first_record_and_survives_a_checkpoint():
    y, pred = _class_stream(5, 3_000, 3)
    score = ClassificationScore(window=100, log_every=500, concern_after=0)
    score.update(y[:700], pred[:700], 3)
    assert score.concern == -1 and score.result(["a", "b", "c"])["concern"] is None
    score.declare_concern(2)
    score.declare_concern(0)  # a class once of concern stays
    resumed = ClassificationScore.from_state(score.state_dict())
    rows = score.update(y[700:], pred[700:], 3)
    assert resumed.update(y[700:], pred[700:], 3) == rows
    assert resumed.concern == score.concern == 2
    want = _sk_focus(y, pred, 2)
    last = rows[-1]
    assert last["records"] == 3_000
    assert (last["concern_precision"], last["concern_recall"], last["concern_f1"]) == \
        pytest.approx(want, abs=1e-12)


def test_rarest_class_ties_go_to_the_lowest_code_and_unseen_classes_do_not_count():
    from stream.run.metrics import rarest_class

    assert rarest_class(np.array([5, 0, 2, 2, 9])) == 2
    assert rarest_class(np.array([0, 0])) == 0
    assert rarest_class(np.array([0, 7])) == 1
