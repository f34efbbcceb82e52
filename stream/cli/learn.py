"""``sapwood learn``: learn a stream to its end (or until stopped), scoring each record
first; the options in groups by concern, or from a run file."""

from __future__ import annotations

import sys
import time

import click

from stream.errors import ConfigError, SapwoodError
from stream.rules.text import CAUTION
from stream.shown import printable

from .output import echo
from .config import config_options, settings_in_force
from .options import (GroupedCommand, drift_options, feed_options, input_options,
                      label_options, output_options, parse_kinds, settings_given, stack,
                      take_renamed, tree_options)


@click.command("learn", cls=GroupedCommand)
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@stack(input_options(), output_options(), tree_options(), drift_options(), feed_options(),
       label_options(), config_options)
@click.option("--quiet", "-q", is_flag=True, help="No closing report on stderr.")
def learn(sources, **kw) -> None:
    """Learn SOURCE... (files in order, - for stdin, or one mqtt:// or redis:// URL) to the
    end, scoring each record first.

    \b
    Example:
      sapwood learn plant.csv --target fault --summary run.json --snapshots rules/
      sapwood learn --config line3.toml          # a deployment in one reviewed file

    With --checkpoint the run can be stopped (SIGINT/SIGTERM: it finishes the batch,
    writes the checkpoint and exits 0) or killed, and the same command goes on from the
    checkpoint as if it had never stopped.
    """
    from stream.run.engine import LearnRun

    ctx = click.get_current_context()
    print_config, quiet = take_command_flags(kw)
    ctx.params["numeric_splits"] = kw["numeric_splits"]
    if print_config:
        echo(settings_in_force(ctx), nl=False)
        return
    job = learn_job(list(sources), kw)
    progress = _Progress()
    if job.by is not None:
        from stream.run.keyed import KeyedRun

        summary = KeyedRun(job, progress=progress).run()
        progress.done()
        if not quiet:
            echo(keyed_report(summary), err=True)
        return
    try:
        summary = LearnRun(job, progress=progress).run()
    except SapwoodError as exc:   # learned, then the input broke or a result failed
        progress.done()
        if not quiet and exc.summary is not None:
            echo(closing_report(exc.summary), err=True)
        raise
    progress.done()
    if not quiet:
        echo(closing_report(summary), err=True)


def take_command_flags(kw: dict) -> tuple[bool, bool]:
    """Settle ``kw`` (the learn options as click passes them) for :func:`learn_job`: a
    renamed option folded into its new name, and the flags that are not the job's taken
    out. Returns (print_config, quiet)."""
    take_renamed(kw, "numeric_splits")
    return bool(kw.pop("print_config", False)), bool(kw.pop("quiet", False))


def learn_job(sources: list[str], kw: dict):
    """The :class:`~stream.run.job.LearnJob` the options in ``kw`` (as click passes them)
    ask for. Rules about which flags were typed together are checked here; rules about
    the values, by the job."""
    from stream.run.job import (DEFAULT_CHECKPOINT_EVERY, DEFAULT_CHECKPOINT_SECONDS,
                                DEFAULT_LABEL_WINDOW, LearnJob)

    settings = settings_given(kw)
    durable = {}
    if kw["checkpoint_path"]:
        durable = {"checkpoint_path": kw["checkpoint_path"],
                   "checkpoint_every": DEFAULT_CHECKPOINT_EVERY
                   if kw["checkpoint_every"] is None else kw["checkpoint_every"],
                   "checkpoint_seconds": DEFAULT_CHECKPOINT_SECONDS
                   if kw["checkpoint_seconds"] is None else kw["checkpoint_seconds"]}
    elif kw["checkpoint_every"] is not None or kw["checkpoint_seconds"] is not None:
        raise ConfigError("--checkpoint-every and --checkpoint-seconds need --checkpoint FILE")
    if not kw["label_sources"] and (kw["label_window"] is not None or
                                    kw["label_seconds"] is not None):
        raise ConfigError("--label-window and --label-seconds need --labels SOURCE")
    return LearnJob(
        sources=sources, target=kw["target"], fmt=kw["fmt"], schema_path=kw["schema_path"],
        declared=parse_kinds(kw["kinds"]), options=settings, task=kw["task"],
        summary_path=kw["summary_path"], save_path=kw["save_path"],
        snapshot_dir=kw["snapshot_dir"],
        snapshot_every=kw["snapshot_every"] if kw["snapshot_every"] is not None
        else (10000 if kw["snapshot_dir"] else 0),
        snapshot_seconds=kw["snapshot_seconds"] or 0.0,
        snapshot_history=kw["snapshot_history"], snapshot_keep=kw["keep_snapshots"],
        metrics_path=kw["metrics_path"], metrics_every=kw["metrics_every"],
        quarantine_path=kw["quarantine_path"], strict=kw["strict"],
        predictions_path=kw["predictions_path"], events_path=kw["events_path"],
        window=kw["window"], batch_rows=kw["batch_rows"], category_cap=kw["category_cap"],
        class_cap=kw["class_cap"], follow=kw["follow"],
        header=None if kw["header"] is None else [n.strip() for n in kw["header"].split(",")],
        poll_seconds=kw["poll_seconds"], idle_exit=kw["idle_exit"],
        labels=list(kw["label_sources"]),
        label_window=DEFAULT_LABEL_WINDOW if kw["label_window"] is None
        else kw["label_window"],
        label_seconds=kw["label_seconds"] or 0.0, id_field=kw["id_field"],
        concern=kw["concern"], alerts_path=kw["alerts_path"], alert_every=kw["alert_every"],
        alert_move=kw["alert_move"], by=kw["by"], keys_in_memory=kw["keys_in_memory"],
        **durable)


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


def _percent(value) -> str:
    return "n/a" if value is None else f"{100 * value:.1f}%"


def closing_report(s: dict) -> str:
    """What a finished run says on stderr, ending with the caution when it wrote
    predictions."""
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
        if s.get("concern") is not None:
            lines.append(f"  class of concern {printable(s['concern'])}: precision "
                         f"{_percent(s.get('concern_precision'))}, recall "
                         f"{_percent(s.get('concern_recall'))}, F1 "
                         f"{_number(s.get('concern_f1'))}")
    if s.get("drift_alarms"):
        lines.append(f"  drift: {s['swaps']:,} confirmed changes (alternates swapped in); "
                     f"{s['drift_alarms']:,} unconfirmed alarms, {s['alternates_started']:,} "
                     f"alternate subtrees started")
    alerts = s.get("alerts")
    if alerts:
        lines.append(f"  alerts: {alerts['raised']:,} raised, {alerts['sent']:,} sent to "
                     f"{alerts['to']}" + (f", {alerts['pending']:,} not sent yet"
                                          if alerts["pending"] else ""))
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
    if s["outputs"].get("predictions"):
        lines.append(CAUTION)
    return "\n".join(lines)


def keyed_report(s: dict) -> str:
    """What a finished keyed run says on stderr."""
    lines = [f"sapwood: learned {s['learned']:,} of {s['records']:,} records in "
             f"{s['seconds']:.2f} s ({(s['records_per_second'] or 0):,.0f} records/s), "
             f"one tree for each of {s['keys']:,} values of {printable(s['by'])}"]
    if s.get("task") == "regression" and s.get("rmse") is not None:
        lines.append(f"  over all keys: mean absolute error {_number(s.get('mae'))}, "
                     f"RMSE {_number(s.get('rmse'))}")
    elif s.get("accuracy") is not None:
        lines.append(f"  over all keys: accuracy {_percent(s.get('accuracy'))}")
    if s.get("evictions"):
        lines.append(f"  {s['evictions']:,} times a tree was saved to make room "
                     f"(--keys-in-memory {s['keys_in_memory']:,}), {s['reloads']:,} reloaded")
    if s["quarantined"]:
        lines.append(f"  {s['quarantined']:,} records quarantined (without a key: "
                     f"{s['quarantine']}; others in each key's folder)")
    for index in s.get("index", []):
        lines.append(f"  keys: {index}")
    if s.get("stopped") and s.get("checkpoint"):
        lines.append(f"  stopped ({s['stopped']}); the same command goes on from "
                     f"checkpoint {s['checkpoint']['path']}")
    return "\n".join(lines)


def _number(value) -> str:
    return "n/a" if value is None else f"{value:.3f}"
