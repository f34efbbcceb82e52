"""sapwood's engine: a streaming Hoeffding tree that scores each record, then learns it.

Public names (imported lazily, so ``import stream`` stays cheap):

TreeClassifier, Scored   the learner (stream.classifier)
TreeSettings             how the tree grows (stream.settings)
LearnJob, run_learn      a whole learning run with its outputs (stream.engine)
extract_rules, render_text, Rule, Condition   rules (stream.rules)
"""

from __future__ import annotations

import importlib

_PUBLIC = {
    "TreeClassifier": "classifier", "Scored": "classifier", "TreeSettings": "settings",
    "LearnJob": "engine", "run_learn": "engine", "extract_rules": "rules",
    "render_text": "rules", "Rule": "rules", "Condition": "rules",
}
__all__ = sorted(_PUBLIC)


def __getattr__(name: str):
    if name in _PUBLIC:
        return getattr(importlib.import_module(f".{_PUBLIC[name]}", __name__), name)
    raise AttributeError(f"module 'stream' has no attribute {name!r}")
