"""The plan of a grove: which learner learns which Redis stream, with which options, and
where in the shared folder each learner keeps its checkpoint and outputs.

The plan is ``grove.json`` in the grove's folder (a folder every node of the cluster sees
at the same path). It is written once by ``sapwood grove start``; its ``state`` changes to
``stopping`` and ``stopped`` when the grove is stopped. Nothing in this module needs Ray.

Producers' convention: a stream carries the records of one key or of a group of keys.
With groups, the key's stream is ``PREFIX + str(crc32(key) % N)`` (:func:`stream_for`),
a hash that is the same in every process and language (zlib's CRC-32, ISO 3309).
"""

from __future__ import annotations

import json
import os
import re
import shlex
import urllib.parse
import zlib
from dataclasses import dataclass, field

from stream.errors import ConfigError
from stream.run.atomic import write_atomic

PLAN_NAME = "grove.json"
PLAN_VERSION = 1
RAY_NAMESPACE = "sapwood-grove"
"""The Ray namespace of every grove's actors (actor names carry the grove's name)."""
RESERVED_OPTIONS = ("stream", "group", "consumer")
"""Query options of the Redis URL the grove sets itself, per learner."""
OWN_FLAGS = ("--target", "--by", "--checkpoint", "--snapshots", "--summary", "--metrics",
             "--events", "--predictions", "--quarantine", "--save", "--config")
"""learn options the grove passes itself; refused in ``--learn-args``."""


def stream_for(key: str, prefix: str, streams: int) -> str:
    """The stream a producer writes ``key``'s records to when ``streams`` streams named
    ``PREFIX0`` ... ``PREFIX{streams-1}`` carry the keys (CRC-32 of the key's UTF-8)."""
    if streams < 1:
        raise ValueError(f"streams must be at least 1, got {streams}")
    return f"{prefix}{zlib.crc32(key.encode('utf-8')) % streams}"


@dataclass(frozen=True)
class LearnerPlan:
    """One learner: the stream it owns and its folder (relative to the grove's folder)."""

    name: str
    stream: str
    folder: str


@dataclass
class GrovePlan:
    """Everything a learner needs to start, restart or be found again."""

    name: str
    redis: str
    target: str
    by: str
    learn_args: list[str]
    learners: list[LearnerPlan]
    cpus_per_learner: float = 1.0
    state: str = "running"
    extra: dict = field(default_factory=dict)

    @property
    def group(self) -> str:
        """The consumer group every learner reads its stream with."""
        return f"sapwood-grove-{self.name}"

    def actor_name(self, learner: LearnerPlan) -> str:
        """The Ray actor name of ``learner`` (unique within :data:`RAY_NAMESPACE`)."""
        return f"{self.name}/{learner.name}"

    def source_url(self, learner: LearnerPlan) -> str:
        """The Redis URL ``learner`` reads: the grove's URL with its stream, group and
        consumer (the learner's name, the same after each restart)."""
        parts = urllib.parse.urlsplit(self.redis)
        query = urllib.parse.parse_qsl(parts.query, keep_blank_values=True)
        query += [("stream", learner.stream), ("group", self.group),
                  ("consumer", learner.name)]
        return urllib.parse.urlunsplit(parts._replace(query=urllib.parse.urlencode(query)))

    def learn_command(self, home: str, learner: LearnerPlan) -> list[str]:
        """The ``sapwood learn`` arguments of ``learner`` (after ``sapwood``), every output
        inside its folder under ``home``."""
        folder = os.path.join(home, learner.folder)
        out = os.path.join(folder, "out")
        return ["learn", self.source_url(learner), "--target", self.target, "--by", self.by,
                "--checkpoint", os.path.join(folder, "checkpoint"),
                "--snapshots", os.path.join(folder, "rules"),
                "--summary", os.path.join(out, "summary.json"),
                "--metrics", os.path.join(out, "metrics.jsonl"),
                "--events", os.path.join(out, "events.jsonl"),
                "--predictions", os.path.join(out, "predictions.jsonl"),
                "--quarantine", os.path.join(folder, "quarantine.jsonl"),
                "--quiet", *self.learn_args]

    def make_folder(self, home: str, learner: LearnerPlan) -> str:
        """Make ``learner``'s folder (and its output folder) under ``home``; its path."""
        folder = os.path.join(home, learner.folder)
        os.makedirs(os.path.join(folder, "out"), exist_ok=True)
        return folder

    def to_dict(self) -> dict:
        return {"grove_version": PLAN_VERSION, "name": self.name, "redis": self.redis,
                "target": self.target, "by": self.by, "learn_args": self.learn_args,
                "cpus_per_learner": self.cpus_per_learner, "state": self.state,
                "learners": [vars(learner) for learner in self.learners], **self.extra}

    @classmethod
    def from_dict(cls, data: dict) -> "GrovePlan":
        known = {"grove_version", "name", "redis", "target", "by", "learn_args",
                 "cpus_per_learner", "state", "learners"}
        return cls(name=data["name"], redis=data["redis"], target=data["target"],
                   by=data["by"], learn_args=list(data["learn_args"]),
                   learners=[LearnerPlan(**learner) for learner in data["learners"]],
                   cpus_per_learner=float(data.get("cpus_per_learner", 1.0)),
                   state=data.get("state", "running"),
                   extra={k: v for k, v in data.items() if k not in known})


_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")


def folder_name(stream: str) -> str:
    """A folder name for ``stream`` (characters outside ``[A-Za-z0-9_.-]`` become ``_``,
    with the stream's CRC-32 appended when anything was replaced, so names stay apart)."""
    safe = re.sub(r"[^A-Za-z0-9_.-]", "_", stream)
    if safe != stream or safe.startswith("."):
        safe = f"{safe.lstrip('.')}-{zlib.crc32(stream.encode('utf-8')):08x}"
    return safe


def make_plan(name: str, redis: str, streams: list[str], target: str, by: str,
              learn_args: str, cpus_per_learner: float) -> GrovePlan:
    """A checked plan: one learner per stream (each stream named once)."""
    if not _NAME.fullmatch(name):
        raise ConfigError(f"grove name {name!r}: use 1-64 letters, digits, '_', '.' or "
                          f"'-', starting with a letter or digit")
    parts = urllib.parse.urlsplit(redis)
    if parts.scheme not in ("redis", "rediss"):
        raise ConfigError(f"--redis {redis!r}: a grove reads Redis streams; give a "
                          f"redis:// or rediss:// URL")
    given = {k for k, _ in urllib.parse.parse_qsl(parts.query)}
    clash = sorted(given.intersection(RESERVED_OPTIONS))
    if clash:
        raise ConfigError(f"--redis {redis!r}: the grove sets {', '.join(clash)} itself "
                          f"(one stream per learner, the grove's group and consumers); "
                          f"remove it from the URL")
    if not streams:
        raise ConfigError("name at least one stream for the grove to learn")
    seen = sorted({s for s in streams if streams.count(s) > 1})
    if seen:
        raise ConfigError(f"stream {seen[0]!r} is named twice: one learner owns a stream")
    args = shlex.split(learn_args) if learn_args else []
    for arg in args:
        flag = arg.split("=", 1)[0]
        if flag in OWN_FLAGS:
            raise ConfigError(f"--learn-args: {flag} is set by the grove itself (each "
                              f"learner's outputs live in its folder of the grove)")
    folders = [folder_name(s) for s in streams]
    learners = [LearnerPlan(name=f"learner-{i}", stream=s, folder=f"learners/{f}")
                for i, (s, f) in enumerate(zip(streams, folders))]
    return GrovePlan(name=name, redis=redis, target=target, by=by, learn_args=args,
                     learners=learners, cpus_per_learner=cpus_per_learner)


def plan_path(home: str) -> str:
    return os.path.join(home, PLAN_NAME)


def write_plan(home: str, plan: GrovePlan) -> None:
    """Write ``home/grove.json`` atomically (making ``home`` if need be)."""
    os.makedirs(home, exist_ok=True)
    write_atomic(plan_path(home), json.dumps(plan.to_dict(), indent=1) + "\n")


def read_plan(home: str) -> GrovePlan:
    """The plan in ``home``; a clear error when ``home`` holds no grove."""
    path = plan_path(home)
    try:
        with open(path, encoding="utf-8") as handle:
            data = json.load(handle)
        if data.get("grove_version") != PLAN_VERSION:
            raise ValueError(f"version {data.get('grove_version')!r}, expected "
                             f"{PLAN_VERSION}")
        return GrovePlan.from_dict(data)
    except FileNotFoundError:
        raise ConfigError(f"{home!r} holds no grove (no {PLAN_NAME}); start one with "
                          f"`sapwood grove start`") from None
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ConfigError(f"cannot read the grove's plan {path!r}: {exc}") from exc
