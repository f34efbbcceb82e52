"""The rules suite: joining, comparing and reporting the rules of a large tree.

A child ``sapwood learn`` grows a deliberately bushy tree (SEA concept, grace period 4,
tie threshold 0.99, no drift watching: tens of thousands of leaves on 1M rows) with a
snapshot halfway and at the end. Then, in this process, the rules of the last snapshot
are joined (:func:`stream.rules.simplify.simplify`) and the two snapshots compared
(:func:`stream.rules.diff.diff_rules`); ``sapwood notes`` and ``sapwood report`` run as
children on the snapshot directory. No river counterpart: these are sapwood's own views.
"""

from __future__ import annotations

import json
import subprocess
import sys

from stream.child_env import same_code_env

from .common import Bench, Check, Column, SuiteResult, fmt_count, register
from .end_to_end import learn_child, warm_child, warm_note, write_sea_csv

_BUSHY = ["--grace-period", "4", "--tie-threshold", "0.99", "--drift", "off"]


@register("rules")
def rules_suite(bench: Bench) -> SuiteResult:
    """Seconds to join the last snapshot's rules, to compare two snapshots, and for
    ``sapwood notes`` and ``sapwood report`` on them."""
    from stream.rules.diff import diff_rules
    from stream.rules.rule import rules_from_payload
    from stream.rules.simplify import simplify

    rows = bench.csv_rows
    result = SuiteResult(
        "rules", f"rules: the views of a bushy tree grown on {rows:,} SEA rows",
        [Column("step", "step", left=True), Column("rules", "rules", fmt_count),
         Column("seconds", "seconds", lambda v: f"{v:.2f}")])
    warm = warm_child(bench)
    path = bench.workdir / "rules-sea.csv"
    folder = bench.workdir / "rules-snapshots"
    bench.say(f"rules: writing {rows:,} rows and growing a bushy tree")
    write_sea_csv(path, rows, bench.seed)
    learn_child(bench, path, "label", pipe=False, source=str(path),
                extra=[*_BUSHY, "--snapshots", str(folder),
                       "--snapshot-every", str(max(rows // 2, 1))])
    path.unlink()
    documents = [json.loads(p.read_text()) for p in sorted(folder.glob("snapshot-*.json"))]
    first, last = rules_from_payload(documents[0]), rules_from_payload(documents[-1])

    start = bench.clock()
    joined = simplify(last)
    join_seconds = bench.clock() - start
    result.rows.append({"step": f"join the last snapshot's rules (into {len(joined):,})",
                        "rules": len(last), "seconds": join_seconds})
    start = bench.clock()
    diff_rules(first, last)
    result.rows.append({"step": "compare the two snapshots", "rules": len(first) + len(last),
                        "seconds": bench.clock() - start})
    walls = {}
    for command in (["notes", str(folder)],
                    ["report", str(folder), "--out", str(bench.workdir / "rules.html")]):
        bench.say(f"rules: sapwood {command[0]}")
        start = bench.clock()
        subprocess.run([sys.executable, "-m", "stream.cli", *command], check=True,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                       cwd=bench.workdir, env=same_code_env())
        walls[command[0]] = bench.clock() - start
        result.rows.append({"step": f"sapwood {command[0]} (whole command)",
                            "rules": len(last) if command[0] == "notes"
                            else len(first) + len(last), "seconds": walls[command[0]]})
    result.checks = [
        Check(f"joining {len(last):,} rules", join_seconds, 10.0, "<=", "s"),
        Check(f"sapwood notes on a {len(last):,}-rule snapshot", walls["notes"], 10.0, "<=",
              "s"),
    ]
    result.notes.append("The target (10 s for 80,000 rules and more) holds for the full "
                        f"run ({rows:,} rows give about 80,000 rules); --quick grows far "
                        "fewer.")
    result.notes.append(warm_note(warm))
    return result
