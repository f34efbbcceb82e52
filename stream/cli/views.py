"""Operator-view commands for the ``sapwood`` group: diff, notes, explain, watch, report.

Each is a click command object; :mod:`stream.cli` registers them
(``cli.add_command(diff)`` and so on). Like the rest of the CLI they are a thin layer:
the work is done in :mod:`stream.rules.diff`, :mod:`stream.rules.markdown`, :mod:`stream.rules.simplify`,
:mod:`stream.views.explain`, :mod:`stream.views.live_view` and :mod:`stream.views.report`. Errors are
:mod:`stream.errors` exceptions; ``stream.cli.main`` maps them to exit codes.
"""

from __future__ import annotations

import json
import os
import time
from datetime import datetime, timezone

import click

from stream.errors import ConfigError, InputError
from stream.rules.text import CAUTION

from .keys import key_option
from .output import echo
from .options import (Number, Whole, concern_option, exact_option, form_option, format_option,
                      option, renamed)



def _iso_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


# --------------------------------------------------------------------------- diff


@click.command("diff")
@click.argument("paths", nargs=-1, required=True, metavar="DIRECTORY | OLD NEW")
@click.option("--from", "first", type=int, default=None, metavar="N",
              help="Snapshot number to compare from (default: the one before --to).")
@click.option("--to", "last", type=int, default=None, metavar="N",
              help="Snapshot number to compare to (default: the newest).")
@form_option(("text", "json", "markdown"), "For people, machines, or tickets.")
@option("--min-shift", type=Number(0.0, unit="of percentage points"), default=2.0,
        show_default=True,
        help="Smallest move in confidence or coverage (percentage points) listed for a "
             "rule whose conditions and outcome stayed the same.")
@concern_option()
@exact_option()
@key_option("paths")
def diff(paths, first, last, form, form_old, min_shift, concern, exact) -> None:
    """Compare two rule sets: the newest two snapshots of DIRECTORY (or --from/--to), or
    two snapshot or model files OLD and NEW.

    Lists rules new and gone, thresholds moved (in the feature's units), outcomes and
    category lists changed, and confidence or coverage shifts. Rules are matched by their
    conditions, not their ids, so a threshold that moves a little keeps its rule. Changes
    to the rules predicting the class of concern are listed first.

    \b
    Example:
      sapwood diff rules/                 # the newest two snapshots
      sapwood diff rules/ --from 1        # the first snapshot against the newest
    """
    from stream.rules.diff import diff_rules, render_diff_text
    from stream.views.rule_sources import pick_pair

    fmt = form or form_old or "text"
    (old_header, old_rules), (new_header, new_rules) = pick_pair(paths, first, last)
    from stream.rules.concern import concern_of

    concern = concern_of(new_header, new_rules, concern)
    result = diff_rules(old_rules, new_rules, old_header, new_header).concern_first(concern)
    if fmt == "json":
        echo(json.dumps(result.to_dict(), indent=2))
    elif fmt == "markdown":
        from stream.rules.markdown import diff_markdown

        echo(diff_markdown(result, exact=exact) + f"\n> {CAUTION}\n", nl=False)
    else:
        echo(render_diff_text(result, min_shift / 100, exact) + f"\n{CAUTION}\n", nl=False)


# --------------------------------------------------------------------------- notes


@click.command("notes")
@click.argument("path", metavar="MODEL|SNAPSHOT|DIRECTORY")
@click.option("--since", default=None, metavar="N|PATH",
              help="Also list what changed since snapshot N of DIRECTORY, or since the "
                   "snapshot or model file PATH.")
@click.option("--class", "label", default=None, metavar="LABEL",
              help="Only rules that predict LABEL (e.g. the fault class).")
@option("--top", type=Whole(1), default=None,
        help="Only the this many rules covering the most records.")
@click.option("--exact", is_flag=True,
              help="The tree's rules as they are: not joined where they decide alike, "
                   "thresholds in full (not cut to the decimals the data carry).")
@click.option("--title", default=None, help="Heading of the note.")
@concern_option()
@key_option("path")
def notes(path, since, label, top, exact, title, concern) -> None:
    """Write the current rules as Markdown for a ticket or a shift note.

    By default rules that predict the same class and differ in one condition are joined
    (every record still gets the same predicted class), bounds are merged per feature.
    The rules predicting the class of concern come first, those catching most of it
    first; the rest follow by class, then coverage. The note ends with the safety note.
    """
    from stream.rules.concern import concern_of, concern_order, top_rules
    from stream.rules.diff import diff_rules
    from stream.views.rule_sources import load_side
    from stream.rules.markdown import shift_note
    from stream.rules.simplify import Simplified, simplify

    header, rules = load_side(path)
    concern = concern_of(header, rules, concern)
    header = {**header, "concern": concern, "exact": exact, "concern_records": sum(
        r.class_counts.get(concern, 0.0) for r in rules) if concern is not None else 0}
    items = [Simplified(r, (r.id,)) for r in rules] if exact else simplify(rules)
    place = {id(r): k for k, r in enumerate(concern_order([s.rule for s in items], concern))}
    items.sort(key=lambda s: place[id(s.rule)])
    if label is not None:
        known = sorted({r.predict for r in rules if r.predict is not None})
        if label not in known:
            raise ConfigError(f"--class must be one of the predicted classes "
                              f"({', '.join(known)}), got {label!r}")
        items = [s for s in items if s.rule.predict == label]
    total = len(items)
    if top is not None:
        keep = {id(r) for r in top_rules([s.rule for s in items], concern, top)}
        items = [s for s in items if id(s.rule) in keep]
    shown = [s.rule for s in items] if exact else items
    change = None
    if since is not None:
        if since.isdigit() and os.path.isdir(path):
            old_header, old_rules = load_side(path, int(since))
        else:
            old_header, old_rules = load_side(since)
        change = diff_rules(old_rules, rules, old_header, header)
    echo(shift_note(shown, header, change, total=total, title=title), nl=False)


# --------------------------------------------------------------------------- explain


@click.command("explain")
@click.argument("path", metavar="MODEL|SNAPSHOT")
@click.argument("sources", nargs=-1, metavar="[SOURCE...]")
@click.option("--record", "records", multiple=True, metavar="TEXT",
              help="A record as a JSON object, or as a CSV line with the fields in the "
                   "order of the training data's header; repeatable.")
@format_option(group=None)
@option("--form", "form", type=click.Choice(["text", "json"]), default="text",
        show_default=True, help="Text for people, or one JSON object per record.")
@renamed("--output", "--form", "form", type=click.Choice(["text", "json"]))
@option("--limit", type=Whole(1), default=None, help="Explain at most this many records.")
@key_option("path")
def explain(path, sources, records, fmt, form, form_old, limit) -> None:
    """Say which rule scored each record: the rule, its leaf's class counts and confidence,
    and the path of tests from the root with the record's values.

    With a saved MODEL the tree itself routes the record. With only a SNAPSHOT (file or
    directory) the record is checked against each rule's conditions, and no path is shown.
    Records come from --record or from SOURCE files (- for standard input). For a rule id
    on every prediction of a whole file, use `sapwood score` (its "rule" column).

    \b
    Example:
      sapwood explain model.sapwood --record '{"door": "open", "ambient_c": 31}'
    """
    from stream.run.model_file import MAGIC

    output = form_old or form
    if not records and not sources:
        raise ConfigError("give a record (--record TEXT) or a file of records (SOURCE)")
    is_model = False
    if os.path.isfile(path):
        try:
            with open(path, "rb") as handle:
                is_model = handle.read(len(MAGIC)) == MAGIC
        except OSError as exc:
            raise InputError(f"cannot read {path!r}: {exc.strerror or exc}") from exc
    if is_model:
        _explain_with_model(path, sources, records, fmt, output, limit)
    else:
        _explain_with_rules(path, sources, records, fmt, output, limit)


def _reject_text(reject) -> str:
    where = reject.origin if reject.origin.startswith("record ") else \
        f"{reject.origin} line {reject.line}"
    if reject.field is not None:
        where += f", field {reject.field!r}"
    return f"{where}: {reject.value!r} {reject.reason}" if reject.value is not None \
        else f"{where}: {reject.reason}"


def _batches(sources, records, fmt, field_names):
    from stream.views.explain import file_batches, record_batches

    if records:
        yield from record_batches(records, field_names)
    if sources:
        yield from file_batches(sources, fmt)


def _explain_with_model(path, sources, records, fmt, output, limit) -> None:
    from stream.run.tasks import warm_up
    from stream.views.explain import explain_batch, render_explanation
    from stream.run.saved_model import load_model

    saved = load_model(path)
    warm_up()
    target = saved.schema.target
    concern = saved.task.headline(saved.task.result(saved.encoder)).get("concern") \
        or saved.facts.get("concern")
    done = 0
    for batch in _batches(sources, records, fmt, saved.schema.names):
        explained, rejects = explain_batch(saved, batch)
        for reject in rejects:
            echo(f"sapwood: {_reject_text(reject)} (not explained)", err=True)
        for item in explained:
            if limit is not None and done >= limit:
                return
            if output == "json":
                echo(json.dumps(item.to_dict()))
            else:
                echo(render_explanation(item, target, concern))
            done += 1
    if output == "text" and done:
        echo(CAUTION)


def _explain_with_rules(path, sources, records, fmt, output, limit) -> None:
    from stream.views.rule_sources import load_side
    from stream.views.explain import RuleMatcher, render_match

    header, rules = load_side(path)
    matcher = RuleMatcher(rules)
    target = header.get("target", "target")
    rows = []
    for k, text in enumerate(records, 1):
        stripped = text.strip()
        if not stripped.startswith("{"):
            raise ConfigError(f"record {k}: with a snapshot the record must be a JSON "
                              f"object (a CSV line needs the model for the field order)")
        try:
            value = json.loads(stripped)
        except ValueError as exc:
            raise InputError(f"record {k}: not a JSON object ({exc})") from None
        if not isinstance(value, dict):
            raise InputError(f"record {k}: not a JSON object")
        rows.append((f"record {k}", value))
    done = 0

    def emit(origin: str, record: dict) -> bool:
        nonlocal done
        if limit is not None and done >= limit:
            return False
        try:
            found = matcher.match(record)
        except ConfigError as exc:
            echo(f"sapwood: {origin}, {exc} (not explained)", err=True)
            return True
        if output == "json":
            echo(json.dumps({"origin": origin, "rules": [r.id for r in found],
                                   "predicted": found[0].predict if len(found) == 1
                                   else None}))
        else:
            echo(render_match(origin, found, target))
        done += 1
        return True

    for origin, record in rows:
        if not emit(origin, record):
            return
    if sources:
        from stream.views.explain import file_batches

        for batch in file_batches(sources, fmt):
            for reject in batch.rejects:
                echo(f"sapwood: {_reject_text(reject)} (not explained)", err=True)
            frame = batch.frame
            for line, values in zip(batch.lines, frame.to_dict("records")):
                if not emit(f"{batch.origin} line {int(line)}", values):
                    return
    if output == "text" and done:
        echo(CAUTION)


# --------------------------------------------------------------------------- watch


@click.command("watch")
@click.argument("snapshot_dir", metavar="SNAPSHOT_DIR", type=click.Path(file_okay=False))
@click.option("--metrics", "metrics_path", type=click.Path(dir_okay=False),
              help="The run's metrics log (sapwood learn --metrics).")
@click.option("--events", "events_path", type=click.Path(dir_okay=False),
              help="The run's drift events file (JSON lines).")
@option("--every", "interval", type=Number(0.0, inclusive=False, unit="of seconds"),
        default=2.0, show_default=True,
              help="Seconds between refreshes.")
@click.option("--once", is_flag=True, help="Show the view once and stop.")
@exact_option()
@key_option("snapshot_dir", "metrics_path", "events_path")
def watch(snapshot_dir, metrics_path, events_path, interval, once, exact) -> None:
    """Follow a running learner: current rules, headline metrics with their trend, and the
    latest drift events, redrawn in place (on a terminal) until Ctrl-C.

    When the output is not a terminal, a plain block is printed each time something new
    has been written, so the output can go to a log file.
    """
    from stream.views.live_view import WatchState
    from stream.views.live_view import watch as run_watch

    state = WatchState(snapshot_dir, metrics_path, events_path, exact=exact)
    try:
        run_watch(state, click.get_text_stream("stdout"), interval,
                  iterations=1 if once else None, tty=False if once else None)
    except KeyboardInterrupt:
        pass  # Ctrl-C is how a watch ends


# --------------------------------------------------------------------------- report


@click.command("report")
@click.argument("snapshot_dir", metavar="SNAPSHOT_DIR", type=click.Path(file_okay=False))
@click.option("--metrics", "metrics_path", type=click.Path(dir_okay=False),
              help="The run's metrics log (default: the metrics stored in each snapshot).")
@click.option("--events", "events_path", type=click.Path(dir_okay=False),
              help="The run's drift events file, to mark events on the charts.")
@click.option("--out", "out_path", type=click.Path(dir_okay=False), default="report.html",
              show_default=True, help="Where to write the page.")
@click.option("--title", default=None, help="Title of the page.")
@concern_option()
@exact_option()
@key_option("snapshot_dir", "metrics_path", "events_path")
def report(snapshot_dir, metrics_path, events_path, out_path, title, concern, exact) -> None:
    """Write one self-contained HTML page about a run: metrics over time with drift events,
    tree size, rule churn per snapshot, the current rules, the changes from the first
    snapshot to the last, and the safety note. The page loads nothing from the network.
    """
    from stream.views.report import load_report_data, write_report

    started = time.perf_counter()
    data = load_report_data(snapshot_dir, metrics_path, events_path)
    size = write_report(out_path, data, _iso_now(), title, concern, exact)
    echo(f"sapwood: report written to {out_path} ({size / 1024:,.0f} KiB, "
               f"{time.perf_counter() - started:.1f} s)", err=True)
    echo(out_path)


COMMANDS = {"diff": diff, "notes": notes, "explain": explain, "watch": watch,
            "report": report}
"""Name -> command object, for registration in the ``sapwood`` group."""
