"""``sapwood bench``: run the registered suites in order and print what they measured."""

from __future__ import annotations

import tempfile
from pathlib import Path

import click

from stream.errors import SapwoodError

from .common import SUITES, Bench, SuiteResult
# the suites register themselves when imported, in the order ``--suite all`` runs them
from . import learners, end_to_end, feed_path, feeds, rules, false_changes, keyed  # noqa: F401
from .output import environment, render_text, write_outputs
from .streams import STREAMS


def run_bench(bench: Bench, suites: list[str]) -> list[SuiteResult]:
    """Run the named suites in order."""
    unknown = [s for s in suites if s not in SUITES]
    if unknown:
        raise SapwoodError(f"suite must be one of {', '.join(SUITES)}, got {unknown[0]!r}")
    return [SUITES[name](bench) for name in suites]


QUICK = {"records": 5_000, "csv_rows": 50_000, "memory_rows": (20_000, 200_000), "repeats": 1}
"""Sizes of ``--quick``: a smoke run of every suite in a minute or two."""


def _river_records(ctx, param, values: tuple[str, ...]) -> dict[str, int]:
    limits = {}
    for value in values:
        stream, sep, count = value.rpartition("=")
        stream = stream if sep else "*"
        if stream != "*" and stream not in STREAMS:
            raise click.BadParameter(f"stream must be one of {', '.join(STREAMS)}, "
                                     f"got {stream!r}")
        try:
            number = int(count)
        except ValueError:
            number = 0
        if number < 1:
            raise click.BadParameter(f"river records must be a whole number >= 1, got {count!r}")
        limits[stream] = number
    return limits


@click.command(name="bench")
@click.option("--suite", "suites", multiple=True, default=("all",), show_default=True,
              type=click.Choice([*SUITES, "all"]),
              help="Suite to run (repeatable); all runs every one in order.")
@click.option("--records", type=click.IntRange(min=1), default=None,
              help="Records per learner stream  [default: 200000; 5000 with --quick]")
@click.option("--river-records", "river_records", multiple=True, metavar="[STREAM=]M",
              callback=_river_records,
              help="Time river on the first M records only (of STREAM, or of every "
                   "stream); accuracies are then compared on those records. Repeatable.")
@click.option("--stream", "streams", multiple=True, type=click.Choice(list(STREAMS)),
              help="Learner stream to run (repeatable; default all).")
@click.option("--seed", type=int, default=1, show_default=True,
              help="Seed of every generated stream and file.")
@click.option("--quick", is_flag=True,
              help="Small sizes for a smoke run (5000 records per learner stream, a "
                   "50k-row file, 20k and 200k rows for memory, no repeats).")
@click.option("--out", "out_path", type=click.Path(dir_okay=False),
              help="Also write the results as JSON to this file and as Markdown beside "
                   "it (same name, .md).")
def command(suites, records, river_records, streams, seed, quick, out_path) -> None:
    """Measure throughput, memory and prequential accuracy against river's tree learners
    on the same streams, in the same run, and say which targets are met.

    Prints ratios; asserts nothing (timings on a shared machine are facts of one run).
    Progress goes to stderr, the tables to stdout.
    """
    sizes = dict(QUICK) if quick else {}
    if records is not None:
        sizes["records"] = records
    names = list(SUITES) if "all" in suites else list(dict.fromkeys(suites))
    with tempfile.TemporaryDirectory(prefix="sapwood-bench-") as scratch:
        bench = Bench(Path(scratch), river_records=river_records, streams=tuple(streams),
                      seed=seed, **sizes)
        env = environment()
        results = run_bench(bench, names)
    click.echo(render_text(results, env), nl=False)
    if out_path:
        for path in write_outputs(out_path, results, env, bench):
            click.echo(f"bench: wrote {path}", err=True)
