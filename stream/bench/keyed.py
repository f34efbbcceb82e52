"""The keyed suite: one tree per key (``sapwood learn --by FIELD``) against one tree over
the same records.

Streams: river's SEA and Agrawal generators (as in the learners suite), each record given
a key drawn uniformly from 1,000 values (seeded; fewer for fewer records: 1,000 records
per key). The same CSV file is learned by a child
``sapwood learn FILE`` with the key ignored (one tree) and with ``--by key`` (1,000 trees),
drift off and with ADWIN; the summaries' records/s are compared. Target: keyed at least
0.5 of the single tree's rate. Also shown: ten times the keys with 1,000 in memory (the others
saved and reloaded; peak memory beside the 1,000-key run's), and river's
HoeffdingTreeClassifier, one per key, on the first records (the plain tree against
sapwood's drift-off keyed run).
"""

from __future__ import annotations

import numpy as np

from .common import Bench, Check, Column, SuiteResult, fmt_count, fmt_ratio, register
from .end_to_end import learn_child, warm_child, warm_note
from .feed_path import _write_csv
from .streams import STREAMS, make_stream

_TARGET = 0.5
_KEYS = 1_000               # at 1M records; fewer records, fewer keys (1,000 records each)
_MANY = 10                  # the second run has this many times the keys, as many in memory
_RIVER_RECORDS = 50_000
_STREAMS = ("sea", "agrawal")


def _mb(value) -> str:
    return "n/a" if value is None else f"{value:,.0f}"


def _river_keyed_rps(bench: Bench, data, spec, keys: np.ndarray, m: int) -> float:
    """River's plain Hoeffding tree, one per key, predict then learn each record."""
    from river.tree import HoeffdingTreeClassifier

    trees: dict = {}
    nominal = list(spec.nominal) or None
    start = bench.clock()
    for (x, label), key in zip(data.pairs[:m], keys[:m].tolist()):
        tree = trees.get(key)
        if tree is None:
            tree = trees[key] = HoeffdingTreeClassifier(nominal_attributes=nominal)
        tree.predict_one(x)
        tree.learn_one(x, label)
    return m / (bench.clock() - start)


@register("keyed")
def keyed_suite(bench: Bench) -> SuiteResult:
    """One tree per key against one tree, from the same file."""
    n = bench.records if bench.records < 200_000 else max(bench.records, 1_000_000)
    result = SuiteResult(
        "keyed", f"keyed: {n:,} records per stream, one tree vs one tree per key "
                 f"(sapwood learn FILE --by key)",
        [Column("stream", "stream", left=True), Column("drift", "drift", left=True),
         Column("keys", "keys", fmt_count), Column("in_memory", "keys in memory", fmt_count),
         Column("rps", "records/s", fmt_count), Column("ratio", "vs one tree", fmt_ratio),
         Column("peak_mb", "peak MB", _mb), Column("evictions", "saved", fmt_count)])
    warm = warm_child(bench)
    rng = np.random.default_rng(bench.seed)
    few = max(10, min(_KEYS, n // 1000))
    many = _MANY * few
    for name in [s for s in _STREAMS if s in bench.streams]:
        spec = STREAMS[name]
        m = min(n, _RIVER_RECORDS)
        bench.say(f"keyed: drawing {n:,} records of {name}")
        data = make_stream(spec, n, m, bench.seed)
        keys = {count: np.char.add("k", rng.integers(0, count, n).astype(str))
                for count in (few, many)}
        path = bench.workdir / f"keyed-{name}.csv"
        rates = {}
        for count, key in keys.items():
            _write_csv(path, data.names, data.kinds, data.X,
                       np.asarray(data.classes, dtype=object)[data.y], {"key": key})
            for detector in ("off", "adwin"):
                if count == many and detector == "off":
                    continue
                common = ["--drift", detector]
                if (detector, "one") not in rates:
                    bench.say(f"keyed: {name}, drift {detector}: one tree")
                    one = learn_child(bench, None, "label", pipe=False, source=str(path),
                                      extra=[*common, "--kind", "key=ignore"])
                    rates[(detector, "one")] = one.summary["records_per_second"]
                    result.rows.append({"stream": name, "drift": detector, "keys": 1,
                                        "in_memory": 1, "rps": rates[(detector, "one")],
                                        "ratio": 1.0, "peak_mb": one.peak_mb,
                                        "evictions": 0})
                bench.say(f"keyed: {name}, drift {detector}: {count:,} keys")
                keyed = learn_child(bench, None, "label", pipe=False, source=str(path),
                                    extra=[*common, "--by", "key", "--keys-in-memory",
                                           str(few)])
                s = keyed.summary
                ratio = s["records_per_second"] / rates[(detector, "one")]
                result.rows.append({"stream": name, "drift": detector, "keys": s["keys"],
                                    "in_memory": min(s["keys"], s["keys_in_memory"]),
                                    "rps": s["records_per_second"], "ratio": ratio,
                                    "peak_mb": keyed.peak_mb, "evictions": s["evictions"]})
                if s["learned"] != n:
                    result.notes.append(f"WARNING: {name}, {count:,} keys: learned "
                                        f"{s['learned']:,} of {n:,}.")
                if count == few:
                    result.checks.append(Check(
                        f"{name}, drift {detector}: {few:,} keys / one tree", ratio,
                        _TARGET, ">=", "x"))
                    if detector == "off":
                        rates["keyed-off"] = s["records_per_second"]
        path.unlink()
        bench.say(f"keyed: river, one HoeffdingTreeClassifier per key, first {m:,} records")
        river = _river_keyed_rps(bench, data, spec, keys[few], m)
        result.notes.append(f"{name}: river, one HoeffdingTreeClassifier per key ({few:,} "
                            f"keys), {river:,.0f} records/s on the first {m:,} records; "
                            f"sapwood --by key drift off {rates['keyed-off'] / river:,.1f}x.")
    result.notes.append("Rates: the child's summary records/s (reading, splitting by key, "
                        "learning and concluding every key's run). Keys are drawn "
                        "uniformly per record (seeded). 'saved': times a tree was written "
                        f"to disk to make room (--keys-in-memory {few:,}).")
    result.notes.append(warm_note(warm))
    return result

