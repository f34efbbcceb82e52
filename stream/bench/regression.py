"""Regression streams and a same-run comparison of the regression tree with river's.

Contents
--------
friedman(n, seed) / friedman_drift(n, seed, drift, position, transition_window)
    river's generators (river.datasets.synth.Friedman and FriedmanDrift; Friedman,
    Annals of Statistics 1991; drifts of Ikonomovska, Gama & Dzeroski 2011) as arrays.
wide_friedman(n, seed, n_features)
    Friedman #1 with more irrelevant inputs (the published formula over the first five
    of ``n_features`` uniform inputs), computed with numpy: a wider stream.
river_counterpart(settings, adaptive)
    river's HoeffdingTreeRegressor (or HoeffdingAdaptiveTreeRegressor) configured like
    ``settings``: grace period, delta, tie threshold, leaf model, selector decay,
    minimum branch records, maximum depth.
compare_with_river(stream, settings, river_model)
    Both learners, prequentially, on the same records in the same process: wall and
    processor seconds, records per second, MAE, RMSE, R^2 of each and the speed ratios.
    river's input dicts are built before its clock starts, as sapwood's arrays are.

Used by the benchmark and the outside checks; not on any learning path.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any

import numpy as np

from stream.regress.model import TreeRegressor
from stream.regress.settings import RegressionSettings

_RIVER_LEAF = {"mean": "mean", "linear": "model", "adaptive": "adaptive"}


@dataclasses.dataclass
class RegressionStream:
    """A finite regression stream as arrays: inputs, target, feature names and kinds."""

    name: str
    X: np.ndarray
    y: np.ndarray
    names: list[str]
    kinds: list[str]


def _from_river(name: str, dataset, n: int) -> RegressionStream:
    rows = list(dataset.take(n))
    keys = list(rows[0][0]) if rows else []
    X = np.array([[x[k] for k in keys] for x, _ in rows], dtype=np.float64).reshape(-1, len(keys))
    y = np.array([t for _, t in rows], dtype=np.float64)
    return RegressionStream(name, X, y, [f"x{k}" for k in keys], ["numeric"] * len(keys))


def friedman(n: int, seed: int = 42) -> RegressionStream:
    """``n`` records of river's Friedman #1 generator (10 inputs, 5 relevant, noise N(0, 1))."""
    from river.datasets import synth
    return _from_river("friedman", synth.Friedman(seed=seed), n)


def friedman_drift(n: int, seed: int = 42, drift: str = "gra",
                   position: tuple[int, ...] | None = None,
                   transition_window: int = 10_000) -> RegressionStream:
    """``n`` records of river's FriedmanDrift: ``lea`` (local expanding abrupt), ``gra``
    (global recurring abrupt) or ``gsg`` (global slow gradual). Drift points default to
    river's (50k, 100k, 150k) scaled to ``n`` (quarters for ``lea``, thirds otherwise)."""
    from river.datasets import synth
    if position is None:
        position = (n // 4, n // 2, 3 * n // 4) if drift == "lea" else (n // 3, 2 * n // 3)
    window = min(transition_window, max(1, (position[1] - position[0]) // 2))
    return _from_river(f"friedman_drift_{drift}",
                       synth.FriedmanDrift(drift_type=drift, position=position,
                                           transition_window=window, seed=seed), n)


def wide_friedman(n: int, seed: int = 42, n_features: int = 50) -> RegressionStream:
    """Friedman #1 (Friedman 1991) over the first five of ``n_features`` uniform inputs:
    y = 10 sin(pi x0 x1) + 20 (x2 - 0.5)^2 + 10 x3 + 5 x4 + N(0, 1)."""
    if n_features < 5:
        raise ValueError(f"wide Friedman needs at least 5 features, got {n_features}")
    rng = np.random.default_rng(seed)
    X = rng.random((n, n_features))
    y = (10.0 * np.sin(np.pi * X[:, 0] * X[:, 1]) + 20.0 * (X[:, 2] - 0.5) ** 2
         + 10.0 * X[:, 3] + 5.0 * X[:, 4] + rng.normal(0.0, 1.0, n))
    return RegressionStream(f"wide_friedman_{n_features}", X, y,
                            [f"x{k}" for k in range(n_features)], ["numeric"] * n_features)


def river_counterpart(settings: RegressionSettings | None = None, adaptive: bool = False,
                      seed: int = 42, nominal: list | None = None):
    """river's regression tree configured like ``settings`` (its own split statistics and linear
    model; those have no exact counterpart)."""
    from river import tree
    settings = settings or RegressionSettings()
    common = dict(grace_period=settings.grace_period, max_depth=settings.max_depth,
                  delta=settings.delta, tau=settings.tie_threshold,
                  leaf_prediction=_RIVER_LEAF[settings.leaf_model],
                  model_selector_decay=settings.selector_decay,
                  min_samples_split=settings.min_branch_records,
                  binary_split=settings.binary_categories, nominal_attributes=nominal)
    if adaptive:
        return tree.HoeffdingAdaptiveTreeRegressor(seed=seed, **common)
    return tree.HoeffdingTreeRegressor(**common)


def _scores(y: np.ndarray, pred: np.ndarray) -> dict:
    err = pred - y
    sst = float(np.sum((y - y.mean()) ** 2)) if y.size else 0.0
    return {"mae": float(np.mean(np.abs(err))) if y.size else None,
            "rmse": float(np.sqrt(np.mean(err ** 2))) if y.size else None,
            "r2": 1.0 - float(np.sum(err ** 2)) / sst if sst > 0 else None}


def _timing(n: int, wall: float, cpu: float) -> dict:
    return {"seconds": wall, "cpu_seconds": cpu,
            "records_per_second": n / wall if wall > 0 else None,
            "cpu_records_per_second": n / cpu if cpu > 0 else None}


def run_sapwood(stream: RegressionStream, settings: RegressionSettings | None = None,
                batch: int = 1000, clock=time.perf_counter,
                cpu_clock=time.process_time, repeats: int = 1) -> dict:
    """Prequential run of :class:`TreeRegressor` over ``stream`` in batches of ``batch``
    (the kernels loaded first, off the clock); with ``repeats`` > 1, the fastest of that
    many runs (each with a fresh tree; the predictions are the same every time)."""
    best: dict | None = None
    for _ in range(max(1, repeats)):
        model = TreeRegressor(stream.names, stream.kinds, settings)
        model.learn(stream.X[:0], stream.y[:0])
        pred = np.empty(stream.y.shape[0])
        started, cpu_started = clock(), cpu_clock()
        for lo in range(0, stream.y.shape[0], batch):
            pred[lo:lo + batch] = model.learn(stream.X[lo:lo + batch],
                                              stream.y[lo:lo + batch]).pred
        timing = _timing(stream.y.shape[0], clock() - started, cpu_clock() - cpu_started)
        if best is None or timing["seconds"] < best["seconds"]:
            best = timing
    return {**_scores(stream.y, pred), **best, "leaves": model.n_leaves,
            "depth": model.depth, "pred": pred}


def run_river(stream: RegressionStream, model: Any, clock=time.perf_counter,
              cpu_clock=time.process_time) -> dict:
    """Prequential run of a river regressor over ``stream`` (dicts built off the clock)."""
    rows = [dict(zip(stream.names, map(float, row))) for row in stream.X]
    pred = np.empty(stream.y.shape[0])
    targets = stream.y.tolist()
    started, cpu_started = clock(), cpu_clock()
    for i, (x, target) in enumerate(zip(rows, targets)):
        pred[i] = model.predict_one(x)
        model.learn_one(x, target)
    timing = _timing(stream.y.shape[0], clock() - started, cpu_clock() - cpu_started)
    return {**_scores(stream.y, pred), **timing, "leaves": model.n_leaves,
            "depth": model.height, "pred": pred}


def compare_with_river(stream: RegressionStream, settings: RegressionSettings | None = None,
                       river_model: Any = None, batch: int = 1000,
                       clock=time.perf_counter, cpu_clock=time.process_time,
                       repeats: int = 1) -> dict:
    """Both learners on ``stream`` in this process; predictions are dropped from the
    result. ``speed_ratio`` is sapwood's records per second over river's by the wall
    clock, ``cpu_speed_ratio`` by processor time (steadier on a shared machine, where a
    run of a second can lose a large share of its wall time to other processes).
    sapwood's time is the best of ``repeats`` runs, river's one run."""
    settings = settings or RegressionSettings()
    if river_model is None:
        river_model = river_counterpart(settings)
    ours = run_sapwood(stream, settings, batch, clock, cpu_clock, repeats)
    theirs = run_river(stream, river_model, clock, cpu_clock)
    ours.pop("pred")
    theirs.pop("pred")
    return {"stream": stream.name, "records": int(stream.y.shape[0]), "sapwood": ours,
            "river": theirs,
            "speed_ratio": theirs["seconds"] / ours["seconds"] if ours["seconds"] > 0 else None,
            "cpu_speed_ratio": (theirs["cpu_seconds"] / ours["cpu_seconds"]
                                if ours["cpu_seconds"] > 0 else None)}
