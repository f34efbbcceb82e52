"""The in-memory suites: sapwood's trees against river's on the same records in memory,
scored then learned (prequential), paired by leaf model: learners, drift, regression."""

from __future__ import annotations

import math

import numpy as np

from .common import (Bench, Check, Column, SuiteResult, best_of, fmt_count, fmt_pct,
                     fmt_ratio, register)
from .streams import (DRIFT_STREAMS, PAIRINGS, STREAMS, LabeledStream, Pairing, StreamSpec,
                      make_stream)


def _warm_learner() -> None:
    """Load (or compile) the kernels for every leaf model before anything is timed."""
    from stream.classify.model import TreeClassifier
    from stream.classify.settings import TreeSettings
    from stream.run.tasks import warm_up

    warm_up()
    X = np.array([[0.1, 0.0], [0.9, 1.0], [0.2, 0.0], [0.8, 1.0]])
    for pairing in PAIRINGS.values():
        model = TreeClassifier(["a", "b"], ["numeric", "category"],
                               TreeSettings(leaf_model=pairing.sapwood, grace_period=1,
                                            detector=pairing.detector))
        model.learn(X, np.array([0, 1, 0, 1], np.int32), ["p", "q"])


def _time_sapwood(data: LabeledStream, n: int, leaf: str, clock, detector: str = "off",
                  repeats: int = 1) -> tuple[float, object, int]:
    from stream.classify.model import TreeClassifier
    from stream.classify.settings import TreeSettings

    X, y = data.X[:n], data.y[:n]

    def run():
        model = TreeClassifier(data.names, data.kinds,
                               TreeSettings(leaf_model=leaf, detector=detector))
        return model.learn(X, y, data.classes).pred, model.n_leaves

    seconds, (pred, leaves) = best_of(repeats, run, clock)
    return seconds, pred, leaves


def _time_river(bench: Bench, data: LabeledStream, spec: StreamSpec, leaf: str,
                what: str) -> tuple[float, np.ndarray, int]:
    """Prequential river run over ``data.pairs``: predict_one, then learn_one, per record."""
    from river.tree import HoeffdingTreeClassifier

    model = HoeffdingTreeClassifier(leaf_prediction=leaf,
                                    nominal_attributes=list(spec.nominal) or None)
    pairs = data.pairs
    guesses: list = [None] * len(pairs)
    clock = bench.clock
    start = shown = clock()
    for i, (x, label) in enumerate(pairs):
        guesses[i] = model.predict_one(x)
        model.learn_one(x, label)
        if i % 4096 == 4095 and clock() - shown > 15:
            shown = clock()
            bench.say(f"  {what}: {i + 1:,} of {len(pairs):,} records, "
                      f"{(i + 1) / (shown - start):,.0f} records/s")
    seconds = clock() - start
    code = {c: k for k, c in enumerate(data.classes)}
    pred = np.array([-1 if g is None else code.get(str(g), -1) for g in guesses], np.int32)
    return seconds, pred, model.n_leaves


def _compare(bench: Bench, name: str, spec: StreamSpec, data: LabeledStream,
             pairing_name: str, pairing: Pairing) -> tuple[dict, list[Check]]:
    n, m = len(data.y), len(data.pairs)
    what = f"{name} {pairing.sapwood}/{pairing.river}"
    bench.say(f"learners: {what}: sapwood on {n:,} records")
    all_seconds, all_pred, all_leaves = _time_sapwood(data, n, pairing.sapwood, bench.clock,
                                                      pairing.detector, bench.repeats)
    seconds, pred, leaves = all_seconds, all_pred, all_leaves
    if m < n:
        seconds, pred, leaves = _time_sapwood(data, m, pairing.sapwood, bench.clock,
                                              pairing.detector, bench.repeats)
    bench.say(f"learners: {what}: river on {m:,} records")
    river_seconds, river_pred, river_leaves = _time_river(bench, data, spec, pairing.river,
                                                          what)
    truth = data.y[:m]
    row = {
        "stream": name, "pairing": pairing_name, "sapwood_leaf_model": pairing.sapwood,
        "river_leaf_prediction": pairing.river, "records": m, "stream_records": n,
        "sapwood_rps": m / seconds if seconds > 0 else math.inf,
        "river_rps": m / river_seconds if river_seconds > 0 else math.inf,
        "sapwood_seconds": seconds, "river_seconds": river_seconds,
        "sapwood_accuracy": float(np.mean(pred == truth)),
        "river_accuracy": float(np.mean(river_pred == truth)),
        "sapwood_correct": int(np.sum(pred == truth)),
        "river_correct": int(np.sum(river_pred == truth)),
        "same_prediction": float(np.mean(pred == river_pred)),
        "sapwood_leaves": leaves, "river_leaves": river_leaves,
        "sapwood_rps_all": n / all_seconds if all_seconds > 0 else math.inf,
        "sapwood_accuracy_all": float(np.mean(all_pred == data.y)),
    }
    row["ratio"] = row["sapwood_rps"] / row["river_rps"]
    checks = []
    if pairing.targets:
        checks = [Check(f"{name}: records/s, sapwood {pairing.sapwood} / river {pairing.river}",
                        row["ratio"], spec.min_ratio, ">=", "x"),
                  Check(f"{name}: accuracy, sapwood {pairing.sapwood} vs river {pairing.river}",
                        row["sapwood_accuracy"], row["river_accuracy"], ">=", "%")]
        row["speed_target"], row["accuracy_target"] = (c.verdict() for c in checks)
    return row, checks


@register("learners")
def learners_suite(bench: Bench) -> SuiteResult:
    """sapwood's TreeClassifier against river's HoeffdingTreeClassifier, prequential."""
    import river

    start = bench.clock()
    _warm_learner()
    warm = bench.clock() - start
    result = SuiteResult(
        "learners",
        f"learners: sapwood TreeClassifier vs river {river.__version__} "
        "HoeffdingTreeClassifier, prequential (score each record, then learn it), "
        f"{bench.records:,} records per stream",
        [Column("stream", "stream", left=True),
         Column("leaf_models", "leaf models", left=True),
         Column("records", "records", fmt_count),
         Column("sapwood_rps", "sapwood rec/s", fmt_count),
         Column("river_rps", "river rec/s", fmt_count),
         Column("ratio", "ratio", fmt_ratio),
         Column("sapwood_accuracy", "sapwood acc", fmt_pct),
         Column("river_accuracy", "river acc", fmt_pct),
         Column("same_prediction", "same pred", fmt_pct),
         Column("leaves", "leaves s/r"),
         Column("speed_target", "speed target", left=True),
         Column("accuracy_target", "accuracy target", left=True)])
    result.notes.append(f"sapwood's kernels were loaded (or compiled) once before any timing "
                        f"({warm:.1f} s, not counted); river's imports are not counted either.")
    result.notes.append("Each learner's time covers only its learning loop over records "
                        "already in memory (river: predict_one then learn_one per record; "
                        "sapwood: one learn() call over the arrays); generating the streams "
                        f"is not timed. sapwood: the best of {bench.repeats} runs, each with a "
                        "fresh tree (a run takes a fraction of a second); river: one run.")
    for name in bench.streams:
        spec = STREAMS[name]
        keep = bench.river_prefix(name)
        start = bench.clock()
        bench.say(f"learners: generating {name} ({bench.records:,} records)")
        data = make_stream(spec, bench.records, keep, bench.seed)
        bench.say(f"learners: {name} generated in {bench.clock() - start:.1f} s")
        for pairing_name, pairing in PAIRINGS.items():
            row, checks = _compare(bench, name, spec, data, pairing_name, pairing)
            row["leaf_models"] = f"{pairing.sapwood}/{pairing.river}" + \
                (f" (sapwood drift {pairing.detector})" if pairing.detector != "off" else "")
            row["leaves"] = f"{row['sapwood_leaves']}/{row['river_leaves']}"
            row.setdefault("speed_target", "(no target)")
            row.setdefault("accuracy_target", "(no target)")
            result.rows.append(row)
            result.checks.extend(checks)
            if row["records"] < row["stream_records"]:
                result.notes.append(
                    f"{name} {row['leaf_models']}: river was timed on the first "
                    f"{row['records']:,} records only (--river-records); rates, ratio and "
                    f"accuracies above are on that prefix. sapwood on all "
                    f"{row['stream_records']:,}: {row['sapwood_rps_all']:,.0f} records/s, "
                    f"accuracy {fmt_pct(row['sapwood_accuracy_all'])}.")
        del data
    for name in bench.streams:
        result.notes.append(f"{name}: {STREAMS[name].title}; seed {bench.seed}.")
    return result


@register("drift")
def drift_suite(bench: Bench) -> SuiteResult:
    """sapwood's default (ADWIN at every node) against river's adaptive tree."""
    import river
    from river.tree import HoeffdingAdaptiveTreeClassifier

    _warm_learner()
    result = SuiteResult(
        "drift",
        f"drift: sapwood TreeClassifier (defaults: adaptive leaves, ADWIN at every node) vs "
        f"river {river.__version__} HoeffdingAdaptiveTreeClassifier (nba leaves, its "
        f"defaults incl. bootstrap sampling, seed {bench.seed}), prequential",
        [Column("stream", "stream", left=True), Column("records", "records", fmt_count),
         Column("sapwood_rps", "sapwood rec/s", fmt_count),
         Column("river_rps", "river rec/s", fmt_count), Column("ratio", "ratio", fmt_ratio),
         Column("sapwood_accuracy", "sapwood acc", fmt_pct),
         Column("river_accuracy", "river acc", fmt_pct),
         Column("events", "alarms/swaps", left=True),
         Column("speed_target", "speed target", left=True),
         Column("accuracy_target", "accuracy target", left=True)])
    n = bench.records
    for name, make in DRIFT_STREAMS.items():
        bench.say(f"drift: generating {name} ({n:,} records)")
        spec = StreamSpec(name, lambda seed, make=make: make(seed, n))
        data = make_stream(spec, n, n, bench.seed)
        from stream.classify.model import TreeClassifier
        from stream.classify.settings import TreeSettings

        def run(data=data):
            model = TreeClassifier(data.names, data.kinds, TreeSettings())
            return model.learn(data.X, data.y, data.classes), model.counters()

        seconds, (scored, counters) = best_of(bench.repeats, run, bench.clock)
        bench.say(f"drift: {name}: river's adaptive tree on {n:,} records")
        reference = HoeffdingAdaptiveTreeClassifier(leaf_prediction="nba", seed=bench.seed)
        guesses: list = [None] * len(data.pairs)
        start = bench.clock()
        for i, (x, label) in enumerate(data.pairs):
            guesses[i] = reference.predict_one(x)
            reference.learn_one(x, label)
        river_seconds = bench.clock() - start
        code = {c: k for k, c in enumerate(data.classes)}
        river_pred = np.array([-1 if g is None else code.get(str(g), -1) for g in guesses])
        row = {"stream": name, "records": n, "sapwood_rps": n / seconds,
               "river_rps": n / river_seconds,
               "sapwood_accuracy": float(np.mean(scored.pred == data.y)),
               "river_accuracy": float(np.mean(river_pred == data.y)),
               "events": f"{counters['drift_alarms']}/{counters['alternates_swapped']} "
                         f"(river swaps {reference.n_switch_alternate_trees})"}
        row["ratio"] = row["sapwood_rps"] / row["river_rps"]
        checks = [Check(f"{name}: records/s vs river's adaptive tree", row["ratio"], 30.0,
                        ">=", "x"),
                  Check(f"{name}: accuracy vs river's adaptive tree", row["sapwood_accuracy"],
                        row["river_accuracy"], ">=", "%")]
        row["speed_target"], row["accuracy_target"] = (c.verdict() for c in checks)
        result.rows.append(row)
        result.checks.extend(checks)
        del data
    result.notes.append(f"sapwood: the best of {bench.repeats} runs, each with a fresh tree; "
                        "river: one run.")
    return result


@register("regression")
def regression_suite(bench: Bench) -> SuiteResult:
    """sapwood's TreeRegressor against river's regression trees."""
    import river
    from river import tree

    from stream.bench import regression as rb
    from stream.regress.model import warm_up as warm_regressor

    warm_regressor()
    result = SuiteResult(
        "regression",
        f"regression: sapwood TreeRegressor vs river {river.__version__} "
        "HoeffdingTreeRegressor (stationary streams; sapwood without drift watching) and "
        "HoeffdingAdaptiveTreeRegressor (drifting streams; sapwood's defaults), same leaf "
        "model (adaptive: mean or linear, whichever errs less), prequential",
        [Column("stream", "stream", left=True), Column("records", "records", fmt_count),
         Column("sapwood_rps", "sapwood rec/s", fmt_count),
         Column("river_rps", "river rec/s", fmt_count), Column("ratio", "ratio", fmt_ratio),
         Column("sapwood_rmse", "sapwood RMSE", lambda v: f"{v:.3f}"),
         Column("river_rmse", "river RMSE", lambda v: f"{v:.3f}"),
         Column("speed_target", "speed target", left=True),
         Column("rmse_target", "RMSE target", left=True)])
    n = bench.records
    cases = [("friedman", rb.friedman(n, bench.seed), False),
             ("friedman-drift-gra", rb.friedman_drift(n, bench.seed, "gra"), True),
             ("friedman-drift-lea", rb.friedman_drift(n, bench.seed, "lea"), True),
             ("wide-friedman-50", rb.wide_friedman(n, bench.seed), False)]
    from stream.regress.settings import RegressionSettings

    for name, stream, drifting in cases:
        bench.say(f"regression: {name} ({n:,} records)")
        # like for like: against river's plain tree, sapwood without drift watching;
        # against river's adaptive tree, sapwood's defaults (ADWIN at every node)
        settings = RegressionSettings() if drifting else RegressionSettings(detector="off")
        river_model = rb.river_counterpart(None, adaptive=drifting)
        if drifting:
            river_model = tree.HoeffdingAdaptiveTreeRegressor(
                leaf_prediction="adaptive", seed=bench.seed)
        out = rb.compare_with_river(stream, settings, river_model, clock=bench.clock,
                                    repeats=bench.repeats)
        row = {"stream": name, "records": out["records"],
               "sapwood_rps": out["records"] / out["sapwood"]["seconds"],
               "river_rps": out["records"] / out["river"]["seconds"],
               "ratio": out["speed_ratio"], "sapwood_rmse": out["sapwood"]["rmse"],
               "river_rmse": out["river"]["rmse"]}
        checks = [Check(f"{name}: records/s vs river", row["ratio"], 50.0, ">=", "x"),
                  Check(f"{name}: RMSE vs river", row["sapwood_rmse"], row["river_rmse"],
                        "<=", "rmse")]
        row["speed_target"], row["rmse_target"] = (c.verdict() for c in checks)
        result.rows.append(row)
        result.checks.extend(checks)
    result.notes.append(f"sapwood: the best of {bench.repeats} runs, each with a fresh tree; "
                        "river: one run.")
    return result
