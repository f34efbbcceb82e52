"""Rules from wherever they are kept: a saved model, a snapshot file, a snapshot directory."""

from __future__ import annotations

import json
import os

from .errors import InputError, ModelFileError
from .model_file import MAGIC
from .rules import Rule, rules_from_payload
from .snapshots import SnapshotStore

_HEADER_KEYS = ("target", "task", "classes", "records", "accuracy", "kappa",
                "window_accuracy", "mae", "rmse", "r2", "data_time", "written_at", "sequence")


def load_rules(path: str) -> tuple[dict, list[Rule]]:
    """(header, rules) from a model file, a snapshot JSON file or a snapshot directory."""
    if os.path.isdir(path):
        entries = SnapshotStore(path).entries()
        if not entries:
            raise InputError(f"{path!r} holds no snapshots")
        payload = SnapshotStore(path).load(entries[-1]["sequence"])
        return _from_payload(payload)
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(MAGIC))
    except OSError as exc:
        raise InputError(f"cannot read {path!r}: {exc.strerror or exc}") from exc
    if head == MAGIC:
        from .saved_model import load_model

        saved = load_model(path)
        task = saved.task
        header = {"target": saved.schema.target, "task": task.name,
                  "classes": saved.encoder.classes, "records": task.records_learned,
                  **task.headline(task.result(saved.encoder))}
        return header, task.rules(saved.encoder.categories)
    try:
        with open(path, encoding="utf-8") as handle:
            payload = json.load(handle)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{path!r} is neither a sapwood model nor a snapshot: "
                             f"{exc}") from exc
    if not isinstance(payload, dict) or "rules" not in payload:
        raise ModelFileError(f"{path!r} is JSON but not a sapwood snapshot (no 'rules')")
    return _from_payload(payload)


def _from_payload(payload: dict) -> tuple[dict, list[Rule]]:
    header = {k: payload[k] for k in _HEADER_KEYS if k in payload}
    return header, rules_from_payload(payload)
