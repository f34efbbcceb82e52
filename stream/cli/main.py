"""The ``sapwood`` command: a thin layer over the engine.

Exit codes: 0 done, 1 bad usage or configuration, 2 input could not be read (see
:mod:`stream.errors`). Messages go to stderr; stdout carries only what was asked for
(predictions, rules, a schema).
"""

from __future__ import annotations

import json
import sys

import click

from stream.errors import EXIT_USAGE, SapwoodError
from stream.rules.text import CAUTION

from .keys import key_option
from .output import echo
from .options import (Whole, concern_option, exact_option, form_option, format_option, option,
                      parse_kinds)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="sapwood", prog_name="sapwood")
def cli() -> None:
    """Learn a decision tree from a live stream of records and keep it current.

    Each record is scored before it is learned. The tree grows a split only when the
    Hoeffding bound says the data justify it, and its leaves can be read as IF/THEN
    rules. Learned rules are advisory, not safety interlocks.
    """


@cli.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False))
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@format_option(group=None)
@click.option("--predictions", "predictions_path", default="-", show_default=True,
              type=click.Path(dir_okay=False, allow_dash=True),
              help="Where predictions go ('-' for stdout; .csv for CSV).")
@click.option("--quarantine", "quarantine_path", type=click.Path(dir_okay=False),
              help="Where rejected records go.")
@key_option("model_path")
def score(model_path, sources, fmt, predictions_path, quarantine_path) -> None:
    """Predict SOURCE... with a saved MODEL, without learning."""
    from stream.run.scoring import score_sources

    report = score_sources(model_path, list(sources), fmt, predictions_path, quarantine_path)
    echo(report, err=True)
    echo(CAUTION, err=True)


@cli.command()
@click.argument("path", metavar="MODEL|SNAPSHOT")
@form_option(("text", "json"), "Aligned text for people, or JSON.")
@option("--top", type=Whole(1), default=None,
        help="Only this many rules: those predicting the class of concern first, then "
             "those covering the most records.")
@concern_option()
@exact_option()
@key_option("path")
def rules(path, form, form_old, top, concern, exact) -> None:
    """Print the rules of a saved MODEL, a snapshot file, or the newest snapshot of a
    snapshot directory, those predicting the class of concern first."""
    from stream.views.rule_sources import load_rules
    from stream.rules.concern import concern_of, concern_order, top_rules

    header, rule_list = load_rules(path)
    concern = concern_of(header, rule_list, concern)
    header = {**header, "concern": concern}
    held = sum(r.class_counts.get(concern, 0.0) for r in rule_list) if concern else 0.0
    if top is not None:
        rule_list = top_rules(rule_list, concern, top)
        header = {**header, "shown": len(rule_list)}
    else:
        rule_list = concern_order(rule_list, concern)
    if (form or form_old) == "json":
        from stream.rules.rule import rules_payload

        echo(json.dumps(rules_payload(rule_list, header), indent=2))
    else:
        from stream.rules.text import render_text

        echo(render_text(rule_list, {**header, "concern_records": held, "exact": exact}),
             nl=False)


@cli.command()
@click.argument("sources", nargs=-1, required=True, metavar="SOURCE...")
@click.option("--target", required=True, help="Field to predict.")
@format_option(group=None)
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
            inferred = infer_schema(batch.frame, target, None, parse_kinds(kinds))
            echo(json.dumps(inferred.to_dict(), indent=2))
            return
    finally:
        source.close()
    raise SapwoodError("no records to infer a schema from")


def _register_commands() -> None:
    """Commands that live in their own modules (operator views, the benchmark)."""
    from stream.bench.command import command as bench_command

    from .grove import grove
    from .keys import keys
    from .learn import learn
    from .views import COMMANDS as view_commands

    cli.add_command(learn, "learn")
    cli.add_command(keys, "keys")
    cli.add_command(grove, "grove")
    for name, command in view_commands.items():
        cli.add_command(command, name)
    cli.add_command(bench_command, "bench")


_register_commands()


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the command, map exceptions to exit codes."""
    try:
        code = cli.main(args=argv, prog_name="sapwood", standalone_mode=False)
    except click.exceptions.Abort:
        echo("sapwood: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        exc.show()
        sys.exit(EXIT_USAGE)
    except SapwoodError as exc:
        echo(f"sapwood: {exc}", err=True)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        echo("sapwood: interrupted", err=True)
        sys.exit(130)
    except BrokenPipeError:
        sys.exit(0)  # the reader of our output went away: nothing left to do
    sys.exit(code if isinstance(code, int) else 0)

