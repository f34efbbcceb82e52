"""The check of a snapshot document (or any JSON holding rules) before views read it.

A snapshot file is written by sapwood, but it is a plain JSON file that people copy,
edit and hand around. Every field a view reads is checked for its type here, so a
damaged or hand-edited file gives one message naming the file, the rule and the field,
never a traceback from deep inside a view.
"""

from __future__ import annotations

from typing import Any

from stream.errors import ModelFileError
from stream.resolution import FINE

_OPS = ("<=", ">", "in", "not in")
_NUMBER = "a number"
_HEADER = {  # field -> (what it must be, test); optional, may be null unless said
    "sequence": ("a whole number", lambda v: _is_int(v)),
    "records": (_NUMBER, lambda v: _is_number(v)),
    "written_at": ("text", lambda v: isinstance(v, str)),
    "target": ("text", lambda v: isinstance(v, str)),
    "task": ("text", lambda v: isinstance(v, str)),
    "classes": ("a list of labels", lambda v: isinstance(v, list)
                and all(isinstance(x, str) for x in v)),
    "accuracy": (_NUMBER, lambda v: v is None or _is_number(v)),
    "kappa": (_NUMBER, lambda v: v is None or _is_number(v)),
    "window_accuracy": (_NUMBER, lambda v: v is None or _is_number(v)),
    "concern": ("text or null", lambda v: v is None or isinstance(v, str)),
    "decimals": (f"an object of whole numbers 0..{FINE}", lambda v: v is None or (
        isinstance(v, dict) and all(_is_int(x) and 0 <= x <= FINE for x in v.values()))),
    "data_time": ("text or a number", lambda v: v is None or isinstance(v, str)
                  or _is_number(v)),
    "rule_count": ("a whole number", lambda v: _is_int(v)),
    "tree": ("an object of numbers", lambda v: v is None or _numbers_object(v)),
    "metrics": ("an object of numbers (and tables)", lambda v: v is None or _numbers_object(
        v, tables=True)),
    "headline": ("an object", lambda v: v is None or isinstance(v, dict)),
    "events": ("a list of objects", lambda v: v is None or isinstance(v, list)
               and all(isinstance(x, dict) for x in v)),
}
_RULE = {  # field -> (what, test); all required but the last three
    "id": ("text", lambda v: isinstance(v, str)),
    "conditions": ("a list", lambda v: isinstance(v, list)),
    "predict": ("text or null", lambda v: v is None or isinstance(v, str)),
    "confidence": (_NUMBER, lambda v: _is_number(v)),
    "coverage": (_NUMBER, lambda v: _is_number(v)),
    "records": (_NUMBER, lambda v: _is_number(v)),
    "class_counts": ("an object of numbers", lambda v: isinstance(v, dict)
                     and all(_is_number(x) for x in v.values())),
    "scored": ("a whole number", lambda v: _is_int(v)),
    "hits": ("a whole number", lambda v: _is_int(v)),
    "depth": ("a whole number", lambda v: _is_int(v)),
    "created_at": ("a whole number", lambda v: _is_int(v)),
    "leaf_model": ("text", lambda v: isinstance(v, str)),
    "active": ("true or false", lambda v: isinstance(v, bool)),
}
_RULE_OPTIONAL = {
    "drift": ("text", lambda v: isinstance(v, str)),
    "replaced_at": ("a whole number or null", lambda v: v is None or _is_int(v)),
    "estimate": ("an object or null", lambda v: v is None or isinstance(v, dict)),
}


def check_rules_document(document: Any, where: str) -> dict:
    """``document`` if it is an object whose header fields and ``rules`` (a list of rule
    objects with their conditions) have the types the views read; otherwise
    :class:`ModelFileError` naming ``where``, the rule and the field."""
    if not isinstance(document, dict):
        raise ModelFileError(f"{where} is corrupt: it is not a JSON object")
    for name, (what, test) in _HEADER.items():
        if name in document and not test(document[name]):
            raise _bad(where, f"'{name}'", what, document[name])
    rules = document.get("rules", [])
    if not isinstance(rules, list):
        raise _bad(where, "'rules'", "a list", rules)
    for k, rule in enumerate(rules, 1):
        _check_rule(rule, where, k)
    return document


def _check_rule(rule: Any, where: str, k: int) -> None:
    if not isinstance(rule, dict):
        raise _bad(where, f"rule {k}", "an object", rule)
    name = f"rule {k}" + (f" ({rule['id']})" if isinstance(rule.get("id"), str) else "")
    for field, (what, test) in _RULE.items():
        if field not in rule:
            raise ModelFileError(f"{where} is corrupt: {name} has no '{field}'")
        if not test(rule[field]):
            raise _bad(where, f"{name} '{field}'", what, rule[field])
    for field, (what, test) in _RULE_OPTIONAL.items():
        if field in rule and not test(rule[field]):
            raise _bad(where, f"{name} '{field}'", what, rule[field])
    for c, condition in enumerate(rule["conditions"], 1):
        _check_condition(condition, where, f"{name} condition {c}")


def _check_condition(condition: Any, where: str, name: str) -> None:
    if not isinstance(condition, dict):
        raise _bad(where, name, "an object", condition)
    if not isinstance(condition.get("feature"), str):
        raise _bad(where, f"{name} 'feature'", "text", condition.get("feature"))
    op = condition.get("op")
    if op not in _OPS:
        raise _bad(where, f"{name} 'op'", "one of " + ", ".join(_OPS), op)
    value = condition.get("value")
    if op in ("in", "not in"):
        if not (isinstance(value, list) and all(isinstance(x, str) for x in value)):
            raise _bad(where, f"{name} 'value'", "a list of labels", value)
    elif not _is_number(value):
        raise _bad(where, f"{name} 'value'", _NUMBER, value)
    if not isinstance(condition.get("missing", False), bool):
        raise _bad(where, f"{name} 'missing'", "true or false", condition.get("missing"))
    branch = condition.get("branch", [])
    if not (isinstance(branch, list) and all(isinstance(x, str) for x in branch)):
        raise _bad(where, f"{name} 'branch'", "a list of labels", branch)


def _bad(where: str, name: str, what: str, value: Any) -> ModelFileError:
    shown = repr(value)
    if len(shown) > 60:
        shown = shown[:57] + "..."
    return ModelFileError(f"{where} is corrupt: {name} must be {what}, got {shown}")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _numbers_object(value: Any, tables: bool = False) -> bool:
    return isinstance(value, dict) and all(
        v is None or _is_number(v) or (tables and (isinstance(v, dict) or (
            k == "concern" and isinstance(v, str))))
        for k, v in value.items())
