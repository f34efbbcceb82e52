"""One learner of a grove as a Ray actor: it runs ``sapwood learn`` on its stream in a
child process and keeps it running.

The actor is detached, named and restarted by Ray without limit, so a learner whose
process or node died comes back on a live node; its ``__init__`` then starts the same
``sapwood learn`` command, which resumes from the checkpoint in the shared folder and
re-reads the entries Redis still holds as pending. Ray does not fence a node that is cut
off but alive: the learn command's own fencing (a Redis epoch, :mod:`connectors.fencing`)
makes the older copy stop acknowledging and checkpointing (exit 4).

The child dies with the actor (``PR_SET_PDEATHSIG``, Linux): a killed actor leaves no
learner behind. The actor records what it does in ``actor.json`` in the learner's folder
(node, process, starts, the child's exits), which ``sapwood grove status`` reads.
"""

from __future__ import annotations

import ctypes
import json
import os
import signal
import subprocess
import sys
import threading
import time

import ray

from stream.errors import EXIT_SUPERSEDED
from stream.run.atomic import write_atomic

from .plan import read_plan

STATE_NAME = "actor.json"
LOG_NAME = "learner.log"
RESTART_PAUSE = (1.0, 30.0)
"""Seconds before the child is started again after a failure: first, at most."""
_PR_SET_PDEATHSIG = 1


def _die_with_parent() -> None:  # runs in the child between fork and exec
    ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)


def read_state(folder: str) -> dict:
    """The actor's record in ``folder`` (empty before the first start)."""
    try:
        with open(os.path.join(folder, STATE_NAME), encoding="utf-8") as handle:
            return json.load(handle)
    except (OSError, ValueError):
        return {}


class GroveLearner:
    """The actor: ``home`` is the grove's shared folder, ``index`` the learner's place in
    its plan."""

    def __init__(self, home: str, index: int) -> None:
        self.home = home
        plan = read_plan(home)
        self.plan = plan
        self.learner = plan.learners[index]
        self.folder = plan.make_folder(home, self.learner)
        self._lock = threading.Lock()
        self._stopping = False
        self._child: subprocess.Popen | None = None
        previous = read_state(self.folder)
        context = ray.get_runtime_context()
        self.state = {
            "learner": self.learner.name, "stream": self.learner.stream,
            "starts": int(previous.get("starts", 0)) + 1,
            "node_ip": ray.util.get_node_ip_address(), "node_id": context.get_node_id(),
            "pid": os.getpid(), "started_at": time.time(),
            "child_runs": int(previous.get("child_runs", 0)),
            "child_pid": None, "child_exit": previous.get("child_exit"),
            "status": "starting"}
        self._save()
        if plan.state != "running":
            self._set(status="stopped")
            return
        threading.Thread(target=self._supervise, name="learner-supervisor",
                         daemon=True).start()

    def _save(self) -> None:
        """Write ``actor.json``, unless a later start of this learner has written it: an
        actor on a node that was cut off may still run when its replacement has started,
        and the record is the replacement's."""
        if int(read_state(self.folder).get("starts", 0)) > self.state["starts"]:
            return
        write_atomic(os.path.join(self.folder, STATE_NAME),
                     json.dumps(self.state, indent=1) + "\n")

    def _set(self, **changes) -> None:
        with self._lock:
            self.state.update(changes)
            self._save()

    def _supervise(self) -> None:
        """Start the learn command, and again after a failure, until it is stopped, ends
        by itself or finds itself superseded. The child is forked from this thread, which
        lives as long as the child (the parent-death signal follows the forking thread)."""
        pause = RESTART_PAUSE[0]
        command = [sys.executable, "-m", "stream.cli",
                   *self.plan.learn_command(self.home, self.learner)]
        while True:
            with self._lock:
                if self._stopping:
                    break
                with open(os.path.join(self.folder, LOG_NAME), "ab") as log:
                    log.write(f"--- {time.strftime('%Y-%m-%dT%H:%M:%S')} start "
                              f"{self.state['starts']} on {self.state['node_ip']}\n".encode())
                    log.flush()
                    self._child = subprocess.Popen(
                        command, stdin=subprocess.DEVNULL, stdout=log, stderr=log,
                        preexec_fn=_die_with_parent)
                self.state.update(child_pid=self._child.pid, status="learning",
                                  child_runs=self.state["child_runs"] + 1)
                self._save()
            started = time.monotonic()
            code = self._child.wait()
            status = ("stopped" if self._stopping else
                      "superseded" if code == EXIT_SUPERSEDED else
                      "finished" if code == 0 else "failed")
            self._set(child_pid=None, child_exit=code, status=status)
            if status != "failed":
                break
            if time.monotonic() - started > 60:
                pause = RESTART_PAUSE[0]
            time.sleep(pause)
            pause = min(pause * 2, RESTART_PAUSE[1])

    def report(self) -> dict:
        """What ``sapwood grove status`` shows of this learner, as the actor sees it."""
        with self._lock:
            return dict(self.state)

    def stop(self, timeout: float) -> dict:
        """Stop the learn command cleanly (SIGTERM: it finishes its batch, writes its
        checkpoint and exits), killing it after ``timeout`` seconds."""
        with self._lock:
            self._stopping = True
            child = self._child
        if child is not None and child.poll() is None:
            child.send_signal(signal.SIGTERM)
            try:
                child.wait(timeout)
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait()
        deadline = time.monotonic() + 5
        while self.state.get("child_pid") is not None and time.monotonic() < deadline:
            time.sleep(0.05)  # the supervisor records the exit
        if self.state.get("status") not in ("stopped", "finished", "superseded"):
            self._set(status="stopped")
        return self.report()


RemoteLearner = ray.remote(GroveLearner)
"""The Ray actor class (options are given per learner at start)."""
