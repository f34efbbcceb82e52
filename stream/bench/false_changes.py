"""The false-changes suite: drift alarms, alternates started and swaps on streams where
nothing changes, per 1M records, with sapwood's defaults (ADWIN at every node).

Streams: river's stationary generators of the learners suite (SEA variant 0 with 10%
label noise, Agrawal function 2, Random RBF with 10 features and fixed centroids, LED)
and Friedman #1 for the regression tree. Whatever a detector reports on them is a false
change. Targets: at most 1 swap and 5 alternates started per 1M records.
"""

from __future__ import annotations

from .common import Bench, Check, Column, SuiteResult, fmt_count, register
from .regression import friedman
from .streams import STREAMS, make_stream

_STATIONARY = ("sea", "agrawal", "rbf10", "led")


def _per_million(value: int, n: int) -> float:
    return value * 1_000_000 / n


@register("false-changes")
def false_changes_suite(bench: Bench) -> SuiteResult:
    """Alarms, alternates started and swaps per 1M stationary records."""
    from stream.classify.model import TreeClassifier
    from stream.classify.settings import TreeSettings
    from stream.regress.model import TreeRegressor
    from stream.regress.settings import RegressionSettings

    n = bench.records if bench.records < 200_000 else max(bench.records, 1_000_000)
    result = SuiteResult(
        "false-changes", f"false changes: {n:,} stationary records per stream, defaults",
        [Column("stream", "stream", left=True), Column("alarms", "alarms / 1M", fmt_count),
         Column("starts", "alternates / 1M", fmt_count),
         Column("swaps", "swaps / 1M", lambda v: f"{v:,.1f}")])
    runs = []
    for name in _STATIONARY:
        bench.say(f"false changes: drawing {n:,} records of {name}")
        data = make_stream(STREAMS[name], n, 0, bench.seed)
        model = TreeClassifier(data.names, data.kinds, TreeSettings())
        model.learn(data.X, data.y, data.classes)
        runs.append((name, model.counters()))
    bench.say(f"false changes: drawing {n:,} records of Friedman #1")
    stream = friedman(n, seed=bench.seed)
    model = TreeRegressor(stream.names, stream.kinds, RegressionSettings())
    model.learn(stream.X, stream.y)
    runs.append(("friedman (regression)", model.counters()))
    for name, counts in runs:
        row = {"stream": name, "alarms": _per_million(counts["drift_alarms"], n),
               "starts": _per_million(counts["alternates_started"], n),
               "swaps": _per_million(counts["alternates_swapped"], n)}
        result.rows.append(row)
        result.checks += [
            Check(f"{name}: swaps per 1M stationary records", row["swaps"], 1.0, "<=", "/1M"),
            Check(f"{name}: alternates started per 1M", row["starts"], 5.0, "<=", "/1M"),
        ]
    result.notes.append("Counts from the learners' own counters after learning every "
                        "record in memory; nothing in these streams changes, so every "
                        "alarm, alternate and swap is a false change.")
    return result
