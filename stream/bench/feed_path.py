"""The feed-path suite: how much of the learner's in-memory rate ``sapwood learn`` keeps
when the records come from a CSV file or through a pipe.

For each learner stream (river's generators, as in the learners suite) the records are
drawn once and held in memory; sapwood learns them through
:meth:`~stream.classify.TreeClassifier.learn` (the in-memory rate, best of the bench's
repeats), then the same records written to a CSV file are learned by a child ``sapwood
learn FILE`` and ``sapwood learn -`` (the summary's records/s, which leaves out the
start-up), with drift watching off and with ADWIN; a bare ``pandas.read_csv`` of the
file gives the parser's own rate. Target: file and stdin at least 0.8 of the in-memory
rate of the same settings.
"""

from __future__ import annotations

import numpy as np

from .common import Bench, Check, Column, SuiteResult, fmt_count, register
from .end_to_end import learn_child, warm_child, warm_note
from .learners import _time_sapwood
from .streams import STREAMS, make_stream

_TARGET = 0.8


def _ratio(value: float) -> str:
    return f"{value:.2f}"


@register("feed-path")
def feed_path_suite(bench: Bench) -> SuiteResult:
    """In-memory, file, stdin and pandas rates per stream, drift off and ADWIN."""
    import pandas as pd

    from stream.classify.settings import TreeSettings

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
    warm = warm_child(bench)
    for name in bench.streams:
        spec = STREAMS[name]
        bench.say(f"feed path: drawing {n:,} records of {name}")
        data = make_stream(spec, n, 0, bench.seed)
        path = bench.workdir / f"feed-{name}.csv"
        columns = {}
        for j, (feature, kind) in enumerate(zip(data.names, data.kinds)):
            column = data.X[:, j]
            columns[feature] = np.char.add("c", column.astype(np.int64).astype(str)) \
                if kind == "category" else column
        columns["label"] = np.asarray(data.classes, dtype=object)[data.y]
        pd.DataFrame(columns).to_csv(path, index=False, float_format="%.6f")
        start = bench.clock()
        pd.read_csv(path)
        pandas_rps = n / (bench.clock() - start)
        for detector in ("off", "adwin"):
            seconds, _, _ = _time_sapwood(data, n, TreeSettings().leaf_model, bench.clock,
                                          detector, bench.repeats)
            memory_rps = n / seconds
            extra = ["--drift", detector]
            bench.say(f"feed path: {name}, drift {detector}: file and stdin")
            from_file = learn_child(bench, None, "label", pipe=False, source=str(path),
                                    extra=extra).summary
            from_pipe = learn_child(bench, path, "label", pipe=True, extra=extra).summary
            row = {"stream": name, "drift": detector, "memory_rps": memory_rps,
                   "file_rps": from_file["records_per_second"],
                   "stdin_rps": from_pipe["records_per_second"], "pandas_rps": pandas_rps,
                   "learned": [from_file["learned"], from_pipe["learned"]]}
            row["file_ratio"] = row["file_rps"] / memory_rps
            row["stdin_ratio"] = row["stdin_rps"] / memory_rps
            result.rows.append(row)
            if row["learned"] != [n, n]:
                result.notes.append(f"WARNING: {name}, drift {detector}: learned "
                                    f"{row['learned']} of {n:,}.")
            result.checks += [
                Check(f"{name}, drift {detector}: file / in memory", row["file_ratio"],
                      _TARGET, ">=", "x"),
                Check(f"{name}, drift {detector}: stdin / in memory", row["stdin_ratio"],
                      _TARGET, ">=", "x"),
            ]
        path.unlink()
    result.notes.append("In memory: one TreeClassifier.learn call over the records drawn "
                        "(best of the bench's repeats). File and stdin: the child's "
                        "records/s, from the first record read to the last learned.")
    result.notes.append(warm_note(warm))
    return result
