"""Run sapwood end to end on the invented reefer fleet and say where everything went.

    python demo/run.py [--rows 200000] [--out demo/output]

Generates the stream (demo/reefer_fleet.py), learns it with ``sapwood learn`` exactly as
a user would from a shell, with an excursion as the class of concern and alerts to a
file, and prints the current rules next to the first snapshot's, so the regime change
part way through the stream can be seen in the rules themselves, then the alerts raised
around it.
"""

from __future__ import annotations

import json
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import click

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from reefer_fleet import drift_row, write_csv  # noqa: E402  (demo/ is not a package)


def _sapwood() -> list[str]:
    found = shutil.which("sapwood")
    return [found] if found else [sys.executable, "-m", "stream.cli"]


def _run(args: list[str]) -> None:
    shown = "sapwood " + " ".join(shlex.quote(a) for a in args)
    click.echo(f"\n$ {shown}")
    done = subprocess.run(_sapwood() + args)
    if done.returncode != 0:
        raise SystemExit(f"demo: the command above failed with exit code {done.returncode}")


@click.command()
@click.option("--rows", type=int, default=200_000, show_default=True,
              help="Reports to generate.")
@click.option("--seed", type=int, default=7, show_default=True)
@click.option("--out", "out_dir", type=click.Path(file_okay=False), default=str(HERE / "output"),
              show_default=True, help="Directory for the data and every output.")
def main(rows: int, seed: int, out_dir: str) -> None:
    """Generate the demo stream, learn it, and show the rules before and after the change."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data = out / "reefer.csv"
    snapshots = out / "snapshots"
    if snapshots.exists():
        shutil.rmtree(snapshots)
    change = drift_row(rows, 0.6)
    click.echo(f"demo: generating {rows:,} invented reefer reports into {data} "
               f"(the fleet changes at report {change:,})")
    write_csv(data, rows, seed=seed, drift_at=0.6)
    alerts = out / "alerts.jsonl"
    alerts.unlink(missing_ok=True)

    _run(["learn", str(data), "--target", "excursion_next_hour", "--concern", "yes",
          "--alerts", str(alerts), "--alert-every", str(max(rows // 20, 1000)),
          "--summary", str(out / "summary.json"), "--snapshots", str(snapshots),
          "--snapshot-every", str(max(rows // 10, 1000)), "--metrics", str(out / "metrics.jsonl"),
          "--save", str(out / "model.sapwood"), "--quarantine", str(out / "quarantine.jsonl"),
          "--events", str(out / "events.jsonl")])

    summary = json.loads((out / "summary.json").read_text())
    index = json.loads((snapshots / "index.json").read_text())["snapshots"]
    click.echo("\ndemo: rules learned before the change (snapshot "
               f"{index[0]['sequence']}, {index[0]['records']:,} records):")
    click.echo(_head((snapshots / index[0]["text"]).read_text(), 30))
    click.echo(f"demo: rules now ({summary['learned']:,} records):")
    _run(["rules", str(out / "model.sapwood"), "--top", "8"])
    click.echo(_alert_counts(alerts, change, rows))
    report = out / "report.html"
    _run(["report", str(snapshots), "--metrics", str(out / "metrics.jsonl"),
          "--events", str(out / "events.jsonl"), "--out", str(report)])

    energy = out / "reefer_energy.csv"
    click.echo(f"\ndemo: the same fleet with a numeric target, the energy each unit draws "
               f"(kWh per hour), into {energy}")
    write_csv(energy, rows, seed=seed, drift_at=0.6, energy=True)
    _run(["learn", str(energy), "--target", "unit_kwh_per_hour",
          "--kind", "excursion_next_hour=ignore", "--summary", str(out / "energy.json"),
          "--save", str(out / "energy.sapwood"), "--events", str(out / "energy_events.jsonl"),
          "--quarantine", str(out / "quarantine.jsonl")])
    _run(["rules", str(out / "energy.sapwood"), "--top", "4"])
    energy_summary = json.loads((out / "energy.json").read_text())
    click.echo(f"""
demo: done. Where things went:
  data           {data}
  summary        {out / 'summary.json'}   (accuracy {100 * (summary['accuracy'] or 0):.1f}%)
  metrics log    {out / 'metrics.jsonl'}
  snapshots      {snapshots}/   ({len(index)} snapshots; index.json lists them)
  drift events   {out / 'events.jsonl'}
  saved model    {out / 'model.sapwood'}   (sapwood rules / sapwood score take it)
  report         {report}   (open it in a browser; it loads nothing from the network)
  alerts         {alerts}   (changes to the rules that predict an excursion)
  energy model   {out / 'energy.sapwood'}   (RMSE {energy_summary['rmse'] or 0:.3f} kWh/h)
The demo's answer key (the rules that generated the data) is in {HERE / 'README.md'}.
Learned rules are advisory, not safety interlocks: defer to site safety systems, local
codes and licensed practice.""")


def _alert_counts(path: Path, change: int, rows: int) -> str:
    """How many alerts came before, around and after the regime change."""
    raised = [json.loads(line) for line in path.read_text().splitlines()] \
        if path.exists() else []
    near = max(rows // 10, 1000)
    around = [a for a in raised if change <= a["record"] <= change + near]
    before = [a for a in raised if a["record"] < change]
    kinds: dict[str, int] = {}
    for a in around:
        kinds[a["kind"]] = kinds.get(a["kind"], 0) + 1
    shown = ", ".join(f"{n} {kind.replace('_', ' ')}" for kind, n in sorted(kinds.items()))
    return (f"\ndemo: {len(raised)} alerts on the rules that predict an excursion: "
            f"{len(before)} while the first regime's rules formed, {len(around)} in the "
            f"{near:,} reports after the change at report {change:,}"
            + (f" ({shown})" if shown else "") + f"; they are in {path}")


def _head(text: str, lines: int) -> str:
    kept = text.splitlines()[:lines]
    return "\n".join(kept) + "\n  ...\n"


if __name__ == "__main__":
    main()
