"""``sapwood grove``: keyed learners spread over a Ray cluster, one per Redis stream, with
their checkpoints and outputs in a folder every node shares (see :mod:`stream.grove`)."""

from __future__ import annotations

import json
import time

import click

from stream.errors import ConfigError
from stream.rules.text import CAUTION

from .options import Whole
from .output import echo

ADDRESS = click.option("--address", default=None, metavar="HOST:PORT",
                       help="The Ray cluster's head (default: the cluster this machine "
                            "joined with `ray start`).")


@click.group("grove")
def grove() -> None:
    """Keyed learners on a Ray cluster: one learner per Redis stream, each learning one
    tree per key (`learn --by`), restarted on a live node when its process or node dies.

    \b
    Example (a shared folder /shared/grove seen by every node):
      ray start --head                      # on the first machine; others join it
      sapwood grove start /shared/grove plant:0 plant:1 plant:2 \\
          --redis redis://10.0.0.5:6379/0 --target fault --by line
      sapwood grove status /shared/grove
      sapwood grove gather /shared/grove --key 'line-1*' --report grove.html
      sapwood grove stop /shared/grove
    """


@grove.command("start")
@click.argument("home", metavar="FOLDER", type=click.Path(file_okay=False))
@click.argument("streams", nargs=-1, required=True, metavar="STREAM...")
@click.option("--redis", "redis_url", required=True, metavar="URL",
              help="The Redis server or cluster node holding the streams (redis:// or "
                   "rediss://; query options such as format apply to every stream; a "
                   "password_env variable must be set where each node's `ray start` "
                   "ran).")
@click.option("--target", required=True, help="Field to predict.")
@click.option("--by", required=True, metavar="FIELD",
              help="Learn one tree per value of FIELD.")
@click.option("--name", default="grove", show_default=True,
              help="The grove's name (its Redis consumer group is sapwood-grove-NAME).")
@click.option("--learn-args", default="", metavar="'OPTIONS'",
              help="More `sapwood learn` options for every learner, as one quoted string "
                   "(e.g. '--grace-period 100 --checkpoint-seconds 30').")
@click.option("--cpus-per-learner", type=float, default=1.0, show_default=True,
              help="Ray CPUs each learner reserves (how many fit on a node).")
@ADDRESS
def start_command(home, streams, redis_url, target, by, name, learn_args,
                  cpus_per_learner, address) -> None:
    """Start a learner for each STREAM in FOLDER, a folder every node sees at the same
    path. A stopped grove starts again with the same arguments and resumes."""
    from stream.grove import control
    from stream.grove.plan import make_plan

    plan = make_plan(name, redis_url, list(streams), target, by, learn_args,
                     cpus_per_learner)
    _check_learn_args(plan, home)
    reports = control.start(home, plan, address, say=lambda m: echo(m, err=True))
    for report in reports:
        echo(f"{report['learner']}: {report['stream']} on {report['node_ip']} "
             f"(start {report['starts']})", err=True)
    echo(f"grove {plan.name!r} running {len(reports)} learners; see `sapwood grove "
         f"status {home}`", err=True)


def _check_learn_args(plan, home: str) -> None:
    """Refuse learn options that ``sapwood learn`` itself would refuse, before any
    learner starts (a learner with bad options would fail and restart for ever)."""
    from stream.run.keyed import check_keyed_job

    from .learn import learn, learn_job, take_command_flags

    args = plan.learn_command(home, plan.learners[0])[1:]
    try:
        ctx = learn.make_context("learn", list(args))
        with ctx:
            kw = dict(ctx.params)
            sources = list(kw.pop("sources"))
            take_command_flags(kw)
            check_keyed_job(learn_job(sources, kw))
    except click.ClickException as exc:
        raise ConfigError(f"--learn-args: {exc.format_message()}") from None


@grove.command("status")
@click.argument("home", metavar="FOLDER", type=click.Path(file_okay=False))
@click.option("--json", "as_json", is_flag=True, help="One object per learner, as JSON.")
@click.option("--folder-only", is_flag=True,
              help="Only what the shared folder says; do not ask Ray (e.g. while the "
                   "cluster is down).")
@ADDRESS
def status_command(home, as_json, folder_only, address) -> None:
    """Which learner owns which stream and keys, on which node, records learned at the
    last checkpoint, when that was, and restarts."""
    from stream.grove import control

    plan, rows, note = control.status(home, address, ask_ray=not folder_only)
    if as_json:
        echo(json.dumps({"grove": plan.name, "state": plan.state, "learners": rows},
                        indent=1))
        return
    echo(f"grove {plan.name!r} ({plan.state}): {plan.target} by {plan.by}, "
         f"{len(rows)} learners, {sum(r['records'] for r in rows):,} records at the "
         f"last checkpoints")
    if note:
        echo(f"(Ray not asked: {note})")
    now = time.time()
    table = [("learner", "stream", "node", "actor", "learner state", "keys", "records",
              "checkpoint", "restarts")]
    for r in rows:
        alive = {True: "answers", False: "no answer", None: "?"}[r.get("alive")]
        age = (f"{now - r['checkpoint_at']:,.0f} s ago" if r.get("checkpoint_at")
               else "none")
        table.append((r["learner"], r["stream"], r.get("node_ip", "?"), alive,
                      str(r.get("status", "?")), _keys_text(r["keys"]),
                      f"{r['records']:,}", age, str(max(0, int(r.get("starts", 1)) - 1))))
    widths = [max(len(row[i]) for row in table) for i in range(len(table[0]))]
    for row in table:
        echo("  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip())


def _keys_text(keys: list[str], shown: int = 3) -> str:
    if len(keys) <= shown:
        return ",".join(keys) or "-"
    return ",".join(keys[:shown]) + f",... ({len(keys)})"


@grove.command("stop")
@click.argument("home", metavar="FOLDER", type=click.Path(file_okay=False))
@click.option("--timeout", type=Whole(1), default=120, show_default=True,
              help="Seconds each learner has to checkpoint and exit before it is killed "
                   "(it then resumes from its previous checkpoint when started again).")
@ADDRESS
def stop_command(home, timeout, address) -> None:
    """Stop every learner cleanly: each finishes its batch, writes its checkpoint and
    exits; their actors are removed. `grove start` with the same arguments resumes."""
    from stream.grove import control

    control.stop(home, address, float(timeout), say=lambda m: echo(m, err=True))


@grove.command("gather")
@click.argument("home", metavar="FOLDER", type=click.Path(file_okay=False))
@click.option("--key", "patterns", multiple=True, metavar="PATTERN",
              help="Only keys matching PATTERN (shell-style: line-1*); repeatable.")
@click.option("--json", "as_json", is_flag=True, help="The rules as JSON.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False), default=None,
              help="Also write one HTML page with every key's figures and rules here.")
def gather_command(home, patterns, as_json, report_path) -> None:
    """The newest rules of every key of the grove (or those matching --key), read from
    the shared folder, those predicting the class of concern first."""
    from stream.grove.gather import grove_keys, listing_json, listing_text, report_html
    from stream.grove.plan import read_plan
    from stream.run.atomic import write_atomic

    plan = read_plan(home)
    unsnapped: list[str] = []
    found = list(grove_keys(home, plan, patterns, unsnapped))
    if unsnapped:
        echo(f"no rules snapshot yet for {len(unsnapped):,} keys ({_keys_text(unsnapped)}): "
             f"a learner writes one every --snapshot-every records of a key", err=True)
    if not found:
        wanted = f" matching {', '.join(patterns)}" if patterns else ""
        raise ConfigError(f"grove {plan.name!r} has no key{wanted} with rules yet")
    if report_path:
        stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        write_atomic(report_path, report_html(plan, found, stamp))
        echo(f"wrote {report_path} ({len(found):,} keys)", err=True)
    if as_json:
        echo(json.dumps(listing_json(found), indent=1))
    else:
        echo(listing_text(found), nl=False)
        echo(CAUTION, err=True)


@grove.command("route")
@click.argument("keys", nargs=-1, required=True, metavar="KEY...")
@click.option("--prefix", required=True, help="The streams' common prefix, e.g. plant:")
@click.option("--streams", "count", type=Whole(1), required=True,
              help="How many streams carry the keys.")
def route_command(keys, prefix, count) -> None:
    """Print the stream each KEY belongs on when COUNT streams named PREFIX0 ...
    carry the keys: PREFIX + (CRC-32 of the key's UTF-8 bytes mod COUNT), so producers
    in any language agree."""
    from stream.grove.plan import stream_for

    for key in keys:
        echo(f"{key}\t{stream_for(key, prefix, count)}")
