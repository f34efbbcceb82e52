"""The feed-path suite: how much of the learner's in-memory rate ``sapwood learn`` keeps
when the records come from a CSV file or through a pipe.

For each learner stream (river's generators, as in the learners suite) and two
regression streams (Friedman #1 and its 50-feature variant, as in the regression suite)
the records are drawn once and written to a CSV file; sapwood learns them as the file
holds them in one ``learn`` call (the in-memory rate, best of the bench's repeats; the
records read back and encoded by the run's own code beforehand), and a child
``sapwood learn FILE`` and ``sapwood learn -`` learn the file (the summary's records/s,
which leaves out the start-up; best of as many child runs), with drift watching off and
with ADWIN; both must score the same. A bare ``pandas.read_csv`` of the file gives the
parser's own rate. Targets: file
and stdin at least 0.8 of the in-memory rate of the same settings; Friedman #1 from the
file at least 50x river's HoeffdingTreeRegressor (timed on the first 40k records).
"""

from __future__ import annotations

import numpy as np

from .common import Bench, Check, Column, SuiteResult, best_of, fmt_count, register
from .end_to_end import learn_child, warm_child, warm_note
from .streams import STREAMS, make_stream

_TARGET = 0.8
_RIVER_RECORDS = 40_000     # river is timed on the first records only (its rate is flat)


def _ratio(value: float) -> str:
    return f"{value:.2f}"


def _write_csv(path, names: list[str], kinds: list[str], X: np.ndarray, target,
               extra: dict | None = None) -> None:
    """The records as CSV, label last; ``extra`` columns (name: values) before it."""
    import pandas as pd

    columns = {}
    for j, (feature, kind) in enumerate(zip(names, kinds)):
        column = X[:, j]
        columns[feature] = np.char.add("c", column.astype(np.int64).astype(str)) \
            if kind == "category" else column
    columns.update(extra or {})
    columns["label"] = target
    pd.DataFrame(columns).to_csv(path, index=False, float_format="%.6f")


def _measure(bench: Bench, result: SuiteResult, name: str, path, n: int,
             pandas_rps: float) -> dict:
    """Rows for one stream: drift off and ADWIN, in memory (the records as the file holds
    them, see :func:`_as_written`) against ``sapwood learn FILE`` and ``sapwood learn -``."""
    rows = {}
    in_memory = _as_written(path)
    for detector in ("off", "adwin"):
        memory_seconds, memory_score = in_memory(detector, bench)
        memory_rps = n / memory_seconds
        extra = ["--drift", detector]
        bench.say(f"feed path: {name}, drift {detector}: file and stdin")
        from_file = _fastest_child(bench, lambda: learn_child(
            bench, None, "label", pipe=False, source=str(path), extra=extra).summary)
        from_pipe = _fastest_child(bench, lambda: learn_child(
            bench, path, "label", pipe=True, extra=extra).summary)
        row = {"stream": name, "drift": detector, "memory_rps": memory_rps,
               "file_rps": from_file["records_per_second"],
               "stdin_rps": from_pipe["records_per_second"],
               "pandas_rps": pandas_rps if detector == "off" else None,
               "learned": [from_file["learned"], from_pipe["learned"]]}
        row["file_ratio"] = row["file_rps"] / memory_rps
        row["stdin_ratio"] = row["stdin_rps"] / memory_rps
        result.rows.append(row)
        rows[detector] = row
        if row["learned"] != [n, n]:
            result.notes.append(f"WARNING: {name}, drift {detector}: learned "
                                f"{row['learned']} of {n:,}.")
        child_score = from_file.get("accuracy", from_file.get("rmse"))
        if child_score is None or abs(child_score - memory_score) > 1e-6 * max(
                1.0, abs(memory_score)):
            result.notes.append(f"WARNING: {name}, drift {detector}: the file run scored "
                                f"{child_score}, the same records in memory "
                                f"{memory_score:.6f}: not the same learning.")
        result.checks += [
            Check(f"{name}, drift {detector}: file / in memory", row["file_ratio"],
                  _TARGET, ">=", "x"),
            Check(f"{name}, drift {detector}: stdin / in memory", row["stdin_ratio"],
                  _TARGET, ">=", "x"),
        ]
    return rows


def _as_written(path):
    """The records of the CSV file ``path`` as ``sapwood learn`` encodes them (the file
    parsed, the schema inferred and the columns encoded by the run's own code), and a
    function timing one in-memory ``learn`` call over them: (drift detector, bench) ->
    (seconds, score). The file rounds the values drawn to 6 decimals, and with drift
    watching on the tree grown from rounded values can differ in shape and speed
    (Hyperplane with ADWIN, 300k records: 0.41 s drawn, 0.52 s as written), so the
    in-memory rate is taken on the records the file holds, as the file and stdin
    rates are. ``score`` is the prequential accuracy or RMSE, to compare with the
    child's."""
    import pandas as pd

    from connectors.base import RawBatch
    from stream.classify.model import TreeClassifier
    from stream.classify.settings import TreeSettings
    from stream.regress.model import TreeRegressor
    from stream.regress.settings import RegressionSettings
    from stream.run.encoding import Encoder
    from stream.run.job import INFER_ROWS
    from stream.run.schema import infer_schema

    frame = pd.read_csv(path)
    schema = infer_schema(frame.iloc[:INFER_ROWS], "label")
    encoder = Encoder(schema)
    batch = encoder.encode(RawBatch(frame, str(path), np.arange(2, len(frame) + 2)))
    X, y, classification = batch.X, batch.y, schema.task == "classification"

    def timed(detector: str, bench: Bench) -> tuple[float, float]:
        def run():
            if classification:
                model = TreeClassifier(schema.feature_names, schema.feature_kinds,
                                       TreeSettings(detector=detector))
                return model.learn(X, y, encoder.classes, encoder.categories).pred
            model = TreeRegressor(schema.feature_names, schema.feature_kinds,
                                  RegressionSettings(detector=detector))
            return model.learn(X, y, encoder.categories).pred

        seconds, pred = best_of(bench.repeats, run, bench.clock)
        score = float(np.mean(pred == y)) if classification else \
            float(np.sqrt(np.mean((pred - y) ** 2)))
        return seconds, score

    return timed


def _fastest_child(bench: Bench, run) -> dict:
    """The summary of the fastest of ``bench.repeats`` child runs: the same statistic
    as the in-memory rate it is compared with (until 2026-12-05 a single child run
    was compared with the best of the in-memory repeats)."""
    summaries = [run() for _ in range(max(1, bench.repeats))]
    return max(summaries, key=lambda summary: summary["records_per_second"])


def _pandas_rps(bench: Bench, path, n: int) -> float:
    import pandas as pd

    start = bench.clock()
    pd.read_csv(path)
    return n / (bench.clock() - start)


@register("feed-path")
def feed_path_suite(bench: Bench) -> SuiteResult:
    """In-memory, file, stdin and pandas rates per stream, drift off and ADWIN."""
    from stream.bench import regression as rb
    from stream.regress.model import warm_up as warm_regressor
    from stream.regress.settings import RegressionSettings

    n = bench.records if bench.records < 200_000 else max(bench.records, 300_000)
    result = SuiteResult(
        "feed-path", f"feed path: {n:,} records per stream, in memory vs a CSV file vs a pipe",
        [Column("stream", "stream", left=True), Column("drift", "drift", left=True),
         Column("memory_rps", "in memory", fmt_count), Column("file_rps", "file", fmt_count),
         Column("stdin_rps", "stdin", fmt_count), Column("pandas_rps", "read_csv rows/s",
                                                         fmt_count),
         Column("file_ratio", "file / memory", _ratio),
         Column("stdin_ratio", "stdin / memory", _ratio)])
    from stream.run.tasks import warm_up

    warm_up()                      # the kernels loaded here too, before any timing
    warm_regressor()
    warm = warm_child(bench)
    for name in bench.streams:
        spec = STREAMS[name]
        bench.say(f"feed path: drawing {n:,} records of {name}")
        data = make_stream(spec, n, 0, bench.seed)
        path = bench.workdir / f"feed-{name}.csv"
        _write_csv(path, data.names, data.kinds, data.X,
                   np.asarray(data.classes, dtype=object)[data.y])
        _measure(bench, result, name, path, n, _pandas_rps(bench, path, n))
        path.unlink()
    river_rps = None
    for name, stream in (("friedman", rb.friedman(n, bench.seed)),
                         ("wide-friedman-50", rb.wide_friedman(n, bench.seed))):
        bench.say(f"feed path: {name} ({n:,} records, regression)")
        path = bench.workdir / f"feed-{name}.csv"
        _write_csv(path, stream.names, stream.kinds, stream.X, stream.y)
        rows = _measure(bench, result, name, path, n, _pandas_rps(bench, path, n))
        path.unlink()
        if name == "friedman":
            m = min(n, _RIVER_RECORDS)
            bench.say(f"feed path: river's HoeffdingTreeRegressor on {m:,} Friedman records")
            part = rb.RegressionStream(stream.name, stream.X[:m], stream.y[:m],
                                       stream.names, stream.kinds)
            river_rps = m / rb.run_river(part, rb.river_counterpart(
                RegressionSettings(detector="off")), clock=bench.clock)["seconds"]
            ratio = rows["off"]["file_rps"] / river_rps
            result.checks.append(Check("friedman from a file vs river's "
                                       "HoeffdingTreeRegressor", ratio, 50.0, ">=", "x"))
            result.notes.append(f"friedman, drift off, from the file: {ratio:.1f}x river's "
                                f"HoeffdingTreeRegressor ({river_rps:,.0f} rec/s on the "
                                f"first {m:,} records).")
    result.notes.append("In memory: one learn call over the records as the file holds "
                        "them (best of the bench's repeats). File and stdin: the child's "
                        "records/s, from the first record read to the last learned "
                        "(best of as many child runs). "
                        "Regression streams: the target column is named 'label' too.")
    result.notes.append(warm_note(warm))
    return result
