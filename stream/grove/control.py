"""Start, watch and stop a grove from any machine of the Ray cluster (the driver side).

``start`` writes the plan and creates one detached, named actor per learner (restarted
by Ray without limit, spread over the nodes); ``status`` reads what each learner wrote in
the shared folder and, when Ray answers, asks each actor; ``stop`` asks each learner to
checkpoint and exit, then removes its actor for good.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import sys
import time
from typing import Callable, Iterator

from stream.errors import ConfigError, SapwoodError

from .plan import RAY_NAMESPACE, GrovePlan, LearnerPlan, plan_path, read_plan, write_plan

START_TIMEOUT = 120.0
"""Seconds ``start`` waits for every learner to be placed and answer."""
REPORT_TIMEOUT = 10.0
"""Seconds to wait for one actor's answer in ``status``."""


def _ray():
    try:
        import ray
    except ImportError:
        raise ConfigError('the grove runs on Ray, which is not installed: '
                          'pip install "sapwood[grove]"') from None
    return ray


@contextlib.contextmanager
def ray_session(address: str | None) -> Iterator:
    """Ray joined for the block (``address``; ``auto``: the cluster this machine belongs
    to, as ``ray start`` left it), then left. While joined, whatever Ray prints (its
    processes' log lines forwarded to the driver) goes to stderr, so that stdout carries
    only what the command prints (``status --json``)."""
    ray = _ray()
    sys.stdout.flush()
    saved = os.dup(1)
    os.dup2(2, 1)
    try:
        with contextlib.redirect_stdout(sys.stderr):
            try:
                ray.init(address=address or "auto", namespace=RAY_NAMESPACE,
                         logging_level=logging.WARNING, log_to_driver=False)
            except (ConnectionError, RuntimeError, ValueError) as exc:
                raise ConfigError(f"cannot reach a Ray cluster at {address or 'auto'}: "
                                  f"{exc} (start one with `ray start --head`, or give "
                                  f"--address HOST:PORT)") from None
            try:
                yield ray
            finally:
                ray.shutdown()
    finally:
        os.dup2(saved, 1)
        os.close(saved)


def start(home: str, plan: GrovePlan, address: str | None,
          say: Callable[[str], None] = lambda _: None) -> list[dict]:
    """Write ``plan`` into ``home`` and start its learners; the learners' first reports.

    A stopped grove in ``home`` starts again (each learner resumes from its checkpoint)
    when the plan is the same; a running one, or a different plan, is refused."""
    os.makedirs(home, exist_ok=True)
    if os.path.exists(plan_path(home)):
        old = read_plan(home)
        if old.state != "stopped":
            raise ConfigError(f"{home!r} holds grove {old.name!r}, which is {old.state}: "
                              f"stop it first (`sapwood grove stop {home}`)")
        if {**old.to_dict(), "state": None} != {**plan.to_dict(), "state": None}:
            raise ConfigError(f"{home!r} holds a stopped grove with other settings; "
                              f"start it with the same ones, or use another folder")
    with ray_session(address) as ray:
        return _start_actors(ray, home, plan, say)


def _start_actors(ray, home: str, plan: GrovePlan, say: Callable[[str], None]) -> list[dict]:
    from .actor import RemoteLearner

    for learner in plan.learners:
        try:
            ray.get_actor(plan.actor_name(learner), namespace=RAY_NAMESPACE)
        except ValueError:
            continue
        raise ConfigError(f"a learner named {plan.actor_name(learner)!r} is already "
                          f"running on this cluster: stop that grove or choose --name")
    plan.state = "running"
    write_plan(home, plan)
    home = os.path.abspath(home)
    handles = []
    for index, learner in enumerate(plan.learners):
        handles.append(RemoteLearner.options(
            name=plan.actor_name(learner), namespace=RAY_NAMESPACE, lifetime="detached",
            max_restarts=-1, num_cpus=plan.cpus_per_learner,
            scheduling_strategy="SPREAD").remote(home, index))
        say(f"started {learner.name} for stream {learner.stream!r}")
    try:
        return ray.get([h.report.remote() for h in handles], timeout=START_TIMEOUT)
    except ray.exceptions.GetTimeoutError:
        raise SapwoodError(
            f"the learners were not all placed within {START_TIMEOUT:.0f} s (does the "
            f"cluster have {plan.cpus_per_learner:g} CPUs free per learner? see "
            f"--cpus-per-learner); Ray keeps trying: `sapwood grove status {home}`, or "
            f"`sapwood grove stop {home}`") from None


def learner_figures(home: str, learner: LearnerPlan) -> dict:
    """What the shared folder says of ``learner``: its actor's record and its last
    checkpoint (records, keys, when)."""
    from stream.run.keyed import MANIFEST_NAME

    from .actor import read_state

    folder = os.path.join(home, learner.folder)
    figures = {"learner": learner.name, "stream": learner.stream, **read_state(folder)}
    manifest = os.path.join(folder, "checkpoint", MANIFEST_NAME)
    try:
        with open(manifest, encoding="utf-8") as handle:
            written = json.load(handle)
        figures["records"] = int(written["records"])
        figures["keys"] = sorted(written["keys"])
        figures["checkpoint_at"] = os.path.getmtime(manifest)
    except (OSError, ValueError, KeyError, TypeError):
        figures.update(records=0, keys=[], checkpoint_at=None)
    return figures


def status(home: str, address: str | None,
           ask_ray: bool = True) -> tuple[GrovePlan, list[dict], str | None]:
    """(plan, one row per learner, a note when Ray was not asked). Each row holds the
    folder's figures and ``alive``: True (the actor answered), False (no such actor or no
    answer within :data:`REPORT_TIMEOUT`), or None (Ray not asked)."""
    plan = read_plan(home)
    rows = [learner_figures(home, learner) for learner in plan.learners]
    if not ask_ray:
        for row in rows:
            row["alive"] = None
        return plan, rows, "--folder-only"
    try:
        with ray_session(address) as ray:
            _ask_actors(ray, plan, rows)
    except SapwoodError as exc:
        for row in rows:
            row["alive"] = None
        return plan, rows, str(exc)
    return plan, rows, None


def _ask_actors(ray, plan: GrovePlan, rows: list[dict]) -> None:
    pending = {}
    for row, learner in zip(rows, plan.learners):
        try:
            actor = ray.get_actor(plan.actor_name(learner), namespace=RAY_NAMESPACE)
        except ValueError:
            row["alive"] = False
            continue
        pending[id(row)] = (row, actor.report.remote())
    deadline = time.monotonic() + REPORT_TIMEOUT
    for row, ref in pending.values():
        try:
            row.update(ray.get(ref, timeout=max(0.1, deadline - time.monotonic())))
            row["alive"] = True
        except Exception:  # noqa: BLE001 - any failure means: no answer from this actor
            row["alive"] = False


def stop(home: str, address: str | None, timeout: float,
         say: Callable[[str], None] = lambda _: None) -> list[dict]:
    """Ask every learner to checkpoint and exit (killed after ``timeout`` s), then remove
    its actor so Ray does not restart it. The plan is marked stopped."""
    plan = read_plan(home)
    if plan.state == "stopped":
        say(f"grove {plan.name!r} is already stopped")
        return []
    plan.state = "stopping"   # an actor restarted from here on starts no learner
    write_plan(home, plan)
    with ray_session(address) as ray:
        results = _stop_actors(ray, plan, timeout, say)
    plan.state = "stopped"
    write_plan(home, plan)
    return results


def _stop_actors(ray, plan: GrovePlan, timeout: float,
                 say: Callable[[str], None]) -> list[dict]:
    results = []
    for learner in plan.learners:
        try:
            actor = ray.get_actor(plan.actor_name(learner), namespace=RAY_NAMESPACE)
        except ValueError:
            say(f"{learner.name}: no actor (already gone)")
            continue
        try:
            report = ray.get(actor.stop.remote(timeout), timeout=timeout + 30)
        except Exception as exc:  # noqa: BLE001 - the actor is removed all the same
            report = {"learner": learner.name, "status": f"no answer ({exc})"}
        ray.kill(actor, no_restart=True)
        say(f"{learner.name}: {report.get('status')} (exit {report.get('child_exit')})")
        results.append(report)
    return results
