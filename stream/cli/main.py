"""The ``sapwood`` command: a thin layer over the engine.

Exit codes: 0 done, 1 bad usage or configuration, 2 input could not be read (see
:mod:`stream.errors`). Messages go to stderr; stdout carries only what was asked for
(predictions, rules, a schema).
"""

from __future__ import annotations

import json
import sys
import time

import click

from connectors.sources import FORMATS
from stream.classify.settings import CRITERIA, LEAF_MODELS, NUMERIC_OBSERVERS
from stream.errors import EXIT_USAGE, ConfigError, SapwoodError
from stream.regress.settings import REGRESSION_CRITERIA, REGRESSION_LEAF_MODELS
from stream.tree.settings import DETECTORS

KINDS = ("numeric", "category", "id", "time", "ignore")
SAFETY_NOTE = ("Learned rules are advisory, not safety interlocks: defer to site safety "
               "systems, local codes and licensed practice.")


def _parse_kinds(pairs: tuple[str, ...]) -> dict[str, str]:
    declared = {}
    for pair in pairs:
        field, sep, kind = pair.partition("=")
        if not sep or not field or kind not in KINDS:
            raise ConfigError(f"--kind takes FIELD=KIND with KIND one of {', '.join(KINDS)}, "
                              f"got {pair!r}")
        declared[field] = kind
    return declared


class _Progress:
    """One line on stderr, rewritten at most twice a second, only on a terminal."""

    def __init__(self, stream=None, clock=time.monotonic) -> None:
        self.stream = stream or sys.stderr
        self.clock = clock
        self.enabled = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.last = 0.0
        self.shown = False

    def __call__(self, facts: dict) -> None:
        if not self.enabled or self.clock() - self.last < 0.5:
            return
        self.last = self.clock()
        self.stream.write(f"\rsapwood: {facts['records']:,} records, "
                          f"{facts['rate']:,.0f} records/s, "
                          f"{facts['quarantined']:,} quarantined ")
        self.stream.flush()
        self.shown = True

    def done(self) -> None:
        if self.shown:
            self.stream.write("\n")


# CLI option -> settings field (both tasks read the names they know)
_SETTING_NAMES = {"criterion": "criterion", "grace_period": "grace_period", "delta": "delta",
                  "tie_threshold": "tie_threshold", "leaf_model": "leaf_model",
                  "numeric_observer": "numeric_observer",
                  "thresholds": "candidate_thresholds", "bins": "histogram_bins",
                  "max_depth": "max_depth", "memory_mb": "memory_mb", "detector": "detector",
                  "drift_delta": "adwin_delta", "drift_threshold": "page_hinkley_threshold",
                  "swap_after": "swap_after", "swap_significance": "swap_significance"}


def _tree_options(function):
    criteria = sorted(set(CRITERIA) | set(REGRESSION_CRITERIA))
    leaf_models = sorted(set(LEAF_MODELS) | set(REGRESSION_LEAF_MODELS))
    options = [
        click.option("--criterion", type=click.Choice(criteria), default=None,
                     help="Split merit: info_gain (default) or gini for a class target, "
                          "variance (default) or deviation for a numeric one."),
        click.option("--grace-period", type=int, default=None,
                     help="Records a leaf sees between split attempts [200]."),
        click.option("--delta", type=float, default=None,
                     help="One minus the confidence of the Hoeffding bound [1e-7]."),
        click.option("--tie-threshold", type=float, default=None,
                     help="Split anyway once the Hoeffding bound is below this [0.05]."),
        click.option("--leaf-model", type=click.Choice(leaf_models), default=None,
                     help="How leaves predict. Class target: majority, naive_bayes, or "
                          "adaptive (default: per leaf, whichever has been right more "
                          "often). Numeric target: mean, linear or adaptive (default)."),
        click.option("--numeric-observer", type=click.Choice(sorted(NUMERIC_OBSERVERS)),
                     default=None,
                     help="How numeric features propose thresholds for a class target: "
                          "gaussian (default: per-class normal estimators) or histogram "
                          "(quantile bins, for skewed sensors)."),
        click.option("--thresholds", type=int, default=None,
                     help="Candidate thresholds per numeric feature, gaussian observer [10]."),
        click.option("--bins", type=int, default=None,
                     help="Bins per numeric feature of the quantile observers [32]."),
        click.option("--max-depth", type=int, default=None, help="Deepest a leaf may be."),
        click.option("--memory-mb", type=float, default=None,
                     help="Budget for leaf statistics [256]; beyond it the least promising "
                          "leaves stop growing."),
        click.option("--drift", "detector", type=click.Choice(sorted(DETECTORS)), default=None,
                     help="Detector on every node's error: adwin (default) or page_hinkley; "
                          "on an alarm an alternate subtree grows beside the node. 'off' for "
                          "a plain Hoeffding tree."),
        click.option("--drift-delta", type=float, default=None,
                     help="ADWIN's confidence [0.002]: smaller means fewer, later alarms."),
        click.option("--drift-threshold", type=float, default=None,
                     help="Page-Hinkley's alarm threshold in summed error [50]."),
        click.option("--swap-after", type=int, default=None,
                     help="Records both a node and its alternate must have scored before "
                          "they are compared [300]."),
        click.option("--swap-significance", type=float, default=None,
                     help="Significance of the test that swaps in or drops an alternate "
                          "[0.05]."),
    ]
    for option in reversed(options):
        function = option(function)
    return function


def _options(kw: dict) -> dict:
    """The tree options the user gave, under their settings names."""
    return {_SETTING_NAMES[k]: v for k, v in kw.items() if v is not None}


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="sapwood", prog_name="sapwood")
def cli() -> None:
    """Learn a decision tree from a live stream of records and keep it current.

    Each record is scored before it is learned. The tree grows a split only when the
    Hoeffding bound says the data justify it, and its leaves can be read as IF/THEN
    rules. Learned rules are advisory, not safety interlocks.
    """


@cli.command()
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@click.option("--target", required=True, help="Field to predict.")
@click.option("--task", type=click.Choice(["classification", "regression"]), default=None,
              help="Predict a class or a number (default: from the target's values).")
@click.option("--format", "fmt", type=click.Choice(sorted(FORMATS)), default=None,
              help="Input format (default: from each file name; sniffed on stdin).")
@click.option("--schema", "schema_path", type=click.Path(dir_okay=False),
              help="Schema file (JSON) declaring each field's kind; inferred otherwise.")
@click.option("--kind", "kinds", multiple=True, metavar="FIELD=KIND",
              help=f"Declare one field's kind ({', '.join(KINDS)}); repeatable.")
@click.option("--summary", "summary_path", type=click.Path(dir_okay=False),
              help="Write the run's summary here (JSON).")
@click.option("--save", "save_path", type=click.Path(dir_okay=False),
              help="Save the learned model here at the end.")
@click.option("--snapshots", "snapshot_dir", type=click.Path(file_okay=False),
              help="Directory for rule snapshots.")
@click.option("--snapshot-every", type=int, default=None,
              help="Records between snapshots (default 10000 with --snapshots).")
@click.option("--snapshot-seconds", type=float, default=None,
              help="Also take a snapshot when this many seconds have passed since the last.")
@click.option("--snapshot-history", is_flag=True,
              help="With --keep-snapshots: also keep a thinned history of older ones.")
@click.option("--keep-snapshots", type=int, default=None,
              help="Keep only the newest this many snapshots.")
@click.option("--metrics", "metrics_path", type=click.Path(dir_okay=False),
              help="Write a metrics log here (JSON lines).")
@click.option("--metrics-every", type=int, default=1000, show_default=True,
              help="Records between metrics log rows.")
@click.option("--window", type=int, default=1000, show_default=True,
              help="Records in the sliding evaluation window.")
@click.option("--quarantine", "quarantine_path", type=click.Path(dir_okay=False),
              help="Where rejected records go (default sapwood-quarantine.jsonl, created "
                   "only if a record is rejected).")
@click.option("--strict", is_flag=True, help="Stop at the first bad record.")
@click.option("--predictions", "predictions_path", type=click.Path(dir_okay=False,
                                                                    allow_dash=True),
              help="Write each record's prediction here ('-' for stdout; .csv for CSV).")
@click.option("--events", "events_path", type=click.Path(dir_okay=False),
              help="Write drift events here (JSON lines: alarms, alternates started, "
                   "swapped in, dropped; with record, time and where in the tree).")
@click.option("--batch-rows", type=int, default=65536, show_default=True,
              help="Records read per batch (memory vs. call overhead; results are equal).")
@click.option("--checkpoint", "checkpoint_path", type=click.Path(dir_okay=False),
              help="Keep the run's whole state in this file; the same command resumes "
                   "from it after a stop or crash (the previous one is kept as FILE.prev).")
@click.option("--checkpoint-every", type=int, default=None,
              help="Records between checkpoints [100000]; 0 for none.")
@click.option("--checkpoint-seconds", type=float, default=None,
              help="Also checkpoint when this many seconds have passed [60]; 0 for none.")
@click.option("--follow", is_flag=True,
              help="Keep reading the last SOURCE as it grows, across rotation and "
                   "truncation, until SIGINT/SIGTERM (which checkpoint, then exit 0).")
@click.option("--poll-seconds", type=float, default=0.5, show_default=True,
              help="With --follow: how often a quiet file is checked.")
@click.option("--idle-exit", type=float, default=None,
              help="With --follow: end after this many seconds without new records.")
@click.option("--labels", "label_sources", multiple=True, metavar="SOURCE",
              help="Labels that arrive later, joined to the records by id: files of id, "
                   "target and time rows (repeatable), or one mqtt:// or redis:// URL "
                   "polled once per batch of records.")
@click.option("--label-window", type=int, default=None,
              help="Records a record waits for its label before it is dropped [10000].")
@click.option("--label-seconds", type=float, default=None,
              help="Also drop a record whose label has not come within this many "
                   "seconds of data time.")
@click.option("--id-field", default=None,
              help="The field that identifies a record, for joining labels (when the "
                   "schema has no id field).")
@click.option("--quiet", "-q", is_flag=True, help="No closing report on stderr.")
@_tree_options
def learn(sources, target, task, fmt, schema_path, kinds, summary_path, save_path,
          snapshot_dir, snapshot_every, snapshot_seconds, snapshot_history, keep_snapshots,
          metrics_path, metrics_every, window, quarantine_path, strict, predictions_path,
          events_path, batch_rows, checkpoint_path, checkpoint_every, checkpoint_seconds,
          follow, poll_seconds, idle_exit, label_sources, label_window, label_seconds,
          id_field, quiet, **tree) -> None:
    """Learn SOURCE... (files in order, - for stdin, or one mqtt:// or redis:// URL) to the
    end, scoring each record first.

    \b
    Example:
      sapwood learn plant.csv --target fault --summary run.json --snapshots rules/

    With --checkpoint the run can be stopped (SIGINT/SIGTERM: it finishes the batch,
    writes the checkpoint and exits 0) or killed, and the same command goes on from the
    checkpoint as if it had never stopped.
    """
    from stream.run.engine import LearnRun
    from stream.run.job import (DEFAULT_CHECKPOINT_EVERY, DEFAULT_CHECKPOINT_SECONDS,
                                DEFAULT_LABEL_WINDOW, LearnJob)

    durable = {}
    if checkpoint_path:
        durable = {"checkpoint_path": checkpoint_path,
                   "checkpoint_every": DEFAULT_CHECKPOINT_EVERY if checkpoint_every is None
                   else checkpoint_every,
                   "checkpoint_seconds": DEFAULT_CHECKPOINT_SECONDS
                   if checkpoint_seconds is None else checkpoint_seconds}
    elif checkpoint_every is not None or checkpoint_seconds is not None:
        raise ConfigError("--checkpoint-every and --checkpoint-seconds need --checkpoint FILE")
    if not label_sources and (label_window is not None or label_seconds is not None):
        raise ConfigError("--label-window and --label-seconds need --labels SOURCE")

    job = LearnJob(
        sources=list(sources), target=target, fmt=fmt, schema_path=schema_path,
        declared=_parse_kinds(kinds), options=_options(tree), task=task,
        summary_path=summary_path,
        save_path=save_path, snapshot_dir=snapshot_dir,
        snapshot_every=snapshot_every if snapshot_every is not None
        else (10000 if snapshot_dir else 0),
        snapshot_seconds=snapshot_seconds or 0.0, snapshot_history=snapshot_history,
        snapshot_keep=keep_snapshots, metrics_path=metrics_path, metrics_every=metrics_every,
        quarantine_path=quarantine_path, strict=strict, predictions_path=predictions_path,
        events_path=events_path, window=window, batch_rows=batch_rows,
        follow=follow, poll_seconds=poll_seconds, idle_exit=idle_exit,
        labels=list(label_sources),
        label_window=DEFAULT_LABEL_WINDOW if label_window is None else label_window,
        label_seconds=label_seconds or 0.0, id_field=id_field, **durable)
    progress = _Progress()
    summary = LearnRun(job, progress=progress).run()
    progress.done()
    if not quiet:
        click.echo(_closing_report(summary), err=True)


def _percent(value) -> str:
    return "n/a" if value is None else f"{100 * value:.1f}%"


def _closing_report(s: dict) -> str:
    lines = [f"sapwood: learned {s['learned']:,} of {s['records']:,} records in "
             f"{s['seconds']:.2f} s ({(s['records_per_second'] or 0):,.0f} records/s)"]
    rules = f"{s['leaves']} rule{'s' if s['leaves'] != 1 else ''}, depth {s['depth']}"
    if s.get("task") == "regression":
        lines.append(f"  mean absolute error {_number(s.get('mae'))}, RMSE "
                     f"{_number(s.get('rmse'))}, R^2 {_number(s.get('r2'))}; {rules}")
    else:
        lines.append(f"  accuracy {_percent(s.get('accuracy'))}, kappa "
                     f"{_number(s.get('kappa'))}, last {s.get('window', 1000):,} records "
                     f"{_percent(s.get('window_accuracy'))}; {rules}")
    if s.get("drift_alarms"):
        lines.append(f"  drift: {s['drift_alarms']:,} alarms, {s['alternates_started']:,} "
                     f"alternate subtrees started, {s['swaps']:,} swapped in")
    if s["quarantined"]:
        lines.append(f"  {s['quarantined']:,} records quarantined in "
                     f"{s['outputs']['quarantine']}")
    for name, path in s["outputs"].items():
        if path and name != "quarantine":
            lines.append(f"  {name}: {path}")
    checkpoint = s.get("checkpoint")
    if s.get("stopped"):
        how = "no new records" if s["stopped"] == "idle" else s["stopped"]
        lines.append(f"  stopped ({how})" + (
            f"; the same command goes on from checkpoint {checkpoint['path']}"
            if checkpoint else ""))
    elif checkpoint:
        lines.append(f"  checkpoint: {checkpoint['path']}")
    return "\n".join(lines)


def _number(value) -> str:
    return "n/a" if value is None else f"{value:.3f}"


@cli.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False))
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@click.option("--format", "fmt", type=click.Choice(sorted(FORMATS)), default=None,
              help="Input format (default: from each file name; sniffed on stdin).")
@click.option("--predictions", "predictions_path", default="-", show_default=True,
              type=click.Path(dir_okay=False, allow_dash=True),
              help="Where predictions go ('-' for stdout; .csv for CSV).")
@click.option("--quarantine", "quarantine_path", type=click.Path(dir_okay=False),
              help="Where rejected records go.")
def score(model_path, sources, fmt, predictions_path, quarantine_path) -> None:
    """Predict SOURCE... with a saved MODEL, without learning."""
    from stream.run.scoring import score_sources

    report = score_sources(model_path, list(sources), fmt, predictions_path, quarantine_path)
    click.echo(report, err=True)


@cli.command()
@click.argument("path", metavar="MODEL|SNAPSHOT")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Aligned text for people, or JSON.")
@click.option("--top", type=int, default=None,
              help="Only the this many rules that cover the most records.")
def rules(path, fmt, top) -> None:
    """Print the rules of a saved MODEL, a snapshot file, or the newest snapshot of a
    snapshot directory."""
    from stream.views.rule_sources import load_rules
    from stream.rules.rule import sort_rules

    header, rule_list = load_rules(path)
    if top is not None:
        if top < 1:
            raise ConfigError(f"--top must be a whole number >= 1, got {top}")
        kept = sorted(rule_list, key=lambda r: -r.coverage)[:top]
        rule_list = sort_rules(kept)
        header = {**header, "shown": len(rule_list)}
    if fmt == "json":
        from stream.rules.rule import rules_payload

        click.echo(json.dumps(rules_payload(rule_list, header), indent=2))
    else:
        from stream.rules.text import render_text

        click.echo(render_text(rule_list, header), nl=False)


@cli.command()
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@click.option("--target", required=True, help="Field to predict.")
@click.option("--format", "fmt", type=click.Choice(sorted(FORMATS)), default=None)
@click.option("--kind", "kinds", multiple=True, metavar="FIELD=KIND",
              help="Declare one field's kind; repeatable.")
def schema(sources, target, fmt, kinds) -> None:
    """Print the schema sapwood infers from the first records of SOURCE..., as JSON to
    edit and pass back with --schema."""
    from connectors.sources import open_sources

    from stream.run.schema import infer_schema

    source = open_sources(list(sources), fmt)
    try:
        for batch in source.batches():
            inferred = infer_schema(batch.frame, target, None, _parse_kinds(kinds))
            click.echo(json.dumps(inferred.to_dict(), indent=2))
            return
    finally:
        source.close()
    raise SapwoodError("no records to infer a schema from")


def _register_commands() -> None:
    """Commands that live in their own modules (operator views, the benchmark)."""
    from stream.bench.command import command as bench_command
    from .views import COMMANDS as view_commands

    for name, command in view_commands.items():
        cli.add_command(command, name)
    cli.add_command(bench_command, "bench")


_register_commands()


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the command, map exceptions to exit codes."""
    try:
        code = cli.main(args=argv, prog_name="sapwood", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("sapwood: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        exc.show()
        sys.exit(EXIT_USAGE)
    except SapwoodError as exc:
        click.echo(f"sapwood: {exc}", err=True)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        click.echo("sapwood: interrupted", err=True)
        sys.exit(130)
    except BrokenPipeError:
        sys.exit(0)  # the reader of our output went away: nothing left to do
    sys.exit(code if isinstance(code, int) else 0)

