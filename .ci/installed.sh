#!/usr/bin/env bash
# Run the installed `sapwood` from an empty temporary directory on a small generated file:
# learn with snapshots and a saved model, then the operator commands on what it wrote.
set -euo pipefail
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
cd "$work"
python - <<'PY'
import random
rng = random.Random(7)
with open("line.csv", "w") as out:
    out.write("temp_c,door,fault\n")
    for i in range(30_000):
        t = rng.uniform(-5, 30)
        door = rng.choice(["open", "shut"])
        fault = "yes" if (t > 20 and door == "open") != (rng.random() < 0.05) else "no"
        out.write(f"{t:.2f},{door},{fault}\n")
PY
python -c "import stream, sys; assert 'site-packages' in stream.__file__, stream.__file__"
sapwood learn line.csv --target fault --summary run.json --snapshots rules \
    --snapshot-every 10000 --save model.sapwood -q
sapwood rules model.sapwood --top 3 > /dev/null
sapwood diff rules > /dev/null
sapwood notes rules > /dev/null
sapwood report rules --out report.html > /dev/null
sapwood score model.sapwood line.csv --predictions p.jsonl 2> /dev/null
sapwood bench --quick --suite learners --stream sea > /dev/null 2>&1
python - <<'PY'
import json
summary = json.load(open("run.json"))
assert summary["records"] == 30_000 and summary["accuracy"] > 0.8, summary
print(f"installed sapwood: learned {summary['learned']:,} records, accuracy "
      f"{summary['accuracy']:.3f}, {summary['leaves']} rules")
PY
