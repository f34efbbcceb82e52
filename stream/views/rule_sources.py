"""Rules from wherever they are kept: a saved model, a snapshot file, a snapshot directory;
and the two sides of a diff."""

from __future__ import annotations

import json
import os
from typing import Sequence

from stream.errors import ConfigError, InputError, ModelFileError
from stream.rules.document import check_rules_document
from stream.rules.rule import Rule, rules_from_payload
from stream.run.model_file import MAGIC
from stream.run.snapshots import SnapshotStore

_HEADER_KEYS = ("target", "task", "classes", "records", "accuracy", "kappa",
                "window_accuracy", "mae", "rmse", "r2", "data_time", "written_at", "sequence",
                "concern", "decimals")


def read_snapshot(store: SnapshotStore, sequence: int) -> dict:
    """Snapshot ``sequence`` of ``store``, its fields checked for what views read (a
    hand-edited or damaged file gives a message, not a traceback)."""
    where = f"snapshot {sequence} in {str(store.directory)!r}"
    return check_rules_document(store.load(sequence), where)


def load_rules(path: str) -> tuple[dict, list[Rule]]:
    """(header, rules) from a model file, a snapshot JSON file or a snapshot directory."""
    if os.path.isdir(path):
        entries = SnapshotStore(path).entries()
        if not entries:
            raise InputError(f"{path!r} holds no snapshots")
        payload = read_snapshot(SnapshotStore(path), entries[-1]["sequence"])
        return _from_payload(payload)
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(MAGIC))
    except OSError as exc:
        raise InputError(f"cannot read {path!r}: {exc.strerror or exc}") from exc
    if not head:    # the same words as the model reader's
        raise ModelFileError(f"{path!r} is truncated: the file is empty")
    if head == MAGIC:
        from stream.run.saved_model import load_model

        saved = load_model(path)
        task = saved.task
        header = {"target": saved.schema.target, "task": task.name,
                  "classes": saved.encoder.classes, "records": task.records_learned,
                  **task.headline(task.result(saved.encoder)),
                  "decimals": dict(saved.encoder.decimals)}
        if header.get("concern") is None and saved.facts.get("concern") is not None:
            header["concern"] = saved.facts["concern"]  # declared, or a numeric target's
        return header, task.rules(saved.encoder.categories)
    try:
        with open(path, encoding="utf-8") as handle:
            payload = json.load(handle)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{path!r} is neither a sapwood model nor a snapshot: "
                             f"{exc}") from exc
    if not isinstance(payload, dict) or "rules" not in payload:
        raise ModelFileError(f"{path!r} is JSON but not a sapwood snapshot (no 'rules')")
    return _from_payload(check_rules_document(payload, repr(path)))


def _from_payload(payload: dict) -> tuple[dict, list[Rule]]:
    header = {k: payload[k] for k in _HEADER_KEYS if k in payload}
    return header, rules_from_payload(payload)


_SIDE_KEYS = ("target", "task", "classes", "records", "accuracy", "data_time",
              "written_at", "sequence", "concern", "decimals")


def header_of(document: dict) -> dict:
    """Facts that describe one side of a diff, from a snapshot document."""
    header = {k: document[k] for k in _SIDE_KEYS if k in document}
    header["rule_count"] = len(document.get("rules", []))
    return header


def load_side(path: str, sequence: int | None = None) -> tuple[dict, list[Rule]]:
    """(header, rules) of a snapshot file, a model file, or a snapshot directory.

    For a directory, ``sequence`` picks a snapshot (default: the newest).
    """
    if os.path.isdir(path):
        store = SnapshotStore(path)
        if sequence is None:
            entries = store.entries()
            if not entries:
                raise InputError(f"{path!r} holds no snapshots")
            sequence = entries[-1]["sequence"]
        document = read_snapshot(store, sequence)
        return header_of(document), rules_from_payload(document)
    if sequence is not None:
        raise ConfigError(f"a snapshot number needs a snapshot directory, got the file "
                          f"{path!r}")
    header, rules = load_rules(path)
    return {**header, "source": os.path.basename(path), "rule_count": len(rules)}, rules


def pick_pair(paths: Sequence[str], first: int | None = None,
              last: int | None = None) -> tuple[tuple[dict, list[Rule]],
                                                 tuple[dict, list[Rule]]]:
    """The two sides of a diff.

    One directory: its snapshots ``first`` and ``last`` (default: the newest two).
    Two paths: each a snapshot file, model file or directory (its newest snapshot, or
    ``first`` for the first path and ``last`` for the second).
    """
    paths = list(paths)
    for path in paths:
        if not os.path.exists(path):
            raise InputError(f"cannot read {path!r}: no such file or directory")
    if len(paths) == 1:
        path = paths[0]
        if not os.path.isdir(path):
            raise ConfigError(f"one path must be a snapshot directory, got {path!r}; "
                              f"give two snapshot or model files to compare them")
        entries = SnapshotStore(path).entries()
        sequences = [e["sequence"] for e in entries]
        if first is None and last is None:
            if len(sequences) < 2:
                raise InputError(f"{path!r} holds {len(sequences)} snapshot"
                                 f"{'' if len(sequences) == 1 else 's'}; a diff needs two")
            first, last = sequences[-2], sequences[-1]
        elif first is None:
            earlier = [s for s in sequences if s < last]
            if not earlier:
                raise InputError(f"{path!r} holds no snapshot before {last}")
            first = earlier[-1]
        elif last is None:
            last = sequences[-1]
        return load_side(path, first), load_side(path, last)
    if len(paths) == 2:
        return load_side(paths[0], first), load_side(paths[1], last)
    raise ConfigError(f"give one snapshot directory or two snapshots to compare, got "
                      f"{len(paths)} paths")
