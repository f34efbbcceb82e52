"""The way from the root to a node, as conditions on the record's fields.

Condition
    Plain data: a feature/operator/value triple (operators ``<=``, ``>``, ``in``,
    ``not in``) plus ``missing``, whether a record with no value for the feature
    satisfies it (missing values follow the heaviest branch, so this is exact).
merge_conditions(steps, names)
    Path steps merged per feature, in order of first use.
node_conditions(model, node, categories)
    The merged conditions a record meets on its way to ``node``.
drift_state(node_i, leaf, root) -> (state, replaced_at)
    ``watching``, ``replaced`` or ``stable``: what the drift machinery did on the way to
    a leaf.

Both trees share the node layout (:mod:`stream.tree.layout`), so one walk serves both;
the drift events of either tree carry the path read here.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Sequence

import numpy as np

from .layout import (ALT, BRANCH, CHILD_START, EQUALS, FEATURE, KIND, MULTIWAY, N_CHILDREN,
                     NUMERIC, PARENT, SWAPPED, THRESHOLD, WEIGHT)


@dataclasses.dataclass(frozen=True)
class Condition:
    """``feature op value``; ``value`` is a number, or a tuple of category labels.

    ``branch`` (display only) names the categories a ``not in`` condition's branch was
    grown for: the heaviest branch of a per-category split also takes unseen categories,
    so its exact test is "not one of the other branches".
    """

    feature: str
    op: str
    value: Any
    missing: bool = False
    branch: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        value = list(self.value) if isinstance(self.value, tuple) else self.value
        out = {"feature": self.feature, "op": self.op, "value": value,
               "missing": self.missing}
        if self.branch:
            out["branch"] = list(self.branch)
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "Condition":
        value = data["value"]
        return cls(data["feature"], data["op"],
                   tuple(value) if isinstance(value, list) else value,
                   bool(data.get("missing", False)), tuple(data.get("branch", ())))


def _heaviest(node_i: np.ndarray, node_f: np.ndarray, table: np.ndarray, n: int) -> int:
    start, count = node_i[n, CHILD_START], node_i[n, N_CHILDREN]
    best, weight = -1, -1.0
    for c in table[start:start + count]:
        if c >= 0 and node_f[c, WEIGHT] > weight:
            best, weight = int(c), node_f[c, WEIGHT]
    return best


def path_steps(model, leaf: int, categories: dict[str, list[str]]) -> list[tuple]:
    """(feature index, op, value, missing, branch labels) per branch on the way to
    ``leaf``; branch labels only for the catch-all branch of a per-category split."""
    t = model.tables_
    node_i, node_f, table = t.node_i, t.node_f, t.child_table
    steps = []
    child = leaf
    parent = int(node_i[leaf, PARENT])
    while parent >= 0:
        f = int(node_i[parent, FEATURE])
        name = model.feature_names[f]
        labels = categories.get(name, [])
        start, count = node_i[parent, CHILD_START], node_i[parent, N_CHILDREN]
        block = [int(c) for c in table[start:start + count]]
        position = int(node_i[child, BRANCH])
        missing = _heaviest(node_i, node_f, table, parent) == child
        kind = node_i[parent, KIND]
        if kind == NUMERIC:
            steps.append((f, "<=" if position == 0 else ">", float(node_f[parent, THRESHOLD]),
                          missing, None))
        elif kind == EQUALS:
            label = _label(labels, int(node_f[parent, THRESHOLD]))
            steps.append((f, "in" if position == 0 else "not in", {label}, missing, None))
        elif kind == MULTIWAY:
            if missing:  # the heaviest branch also takes categories without a branch
                others = {_label(labels, code) for code, c in enumerate(block)
                          if c >= 0 and c != child}
                steps.append((f, "not in", others, True, {_label(labels, position)}))
            else:
                steps.append((f, "in", {_label(labels, position)}, False, None))
        child = parent
        parent = int(node_i[parent, PARENT])
    steps.reverse()
    return steps


def _label(labels: list[str], code: int) -> str:
    return labels[code] if code < len(labels) else f"#{code}"


def merge_conditions(steps: Sequence[tuple], names: Sequence[str]) -> tuple[Condition, ...]:
    """Merge path steps per feature (in order of first use): numeric bounds become
    ``lo < x <= hi`` (two conditions), category tests one ``in`` / ``not in`` set.
    A merged condition admits missing values only if every step on that feature did."""
    order: list[int] = []
    merged: dict[int, dict] = {}
    for f, op, value, missing, branch in steps:
        if f not in merged:
            order.append(f)
            merged[f] = {"lo": None, "hi": None, "in": None, "out": set(), "missing": True,
                         "branch": None}
        m = merged[f]
        m["missing"] = m["missing"] and missing
        if branch is not None:
            m["branch"] = branch if m["branch"] is None else m["branch"] & branch
        if op == "<=":
            m["hi"] = value if m["hi"] is None else min(m["hi"], value)
        elif op == ">":
            m["lo"] = value if m["lo"] is None else max(m["lo"], value)
        elif op == "in":
            m["in"] = set(value) if m["in"] is None else m["in"] & value
        else:
            m["out"] |= value
    out: list[Condition] = []
    for f in order:
        m, name = merged[f], names[f]
        if m["lo"] is not None:
            out.append(Condition(name, ">", m["lo"], m["missing"]))
        if m["hi"] is not None:
            out.append(Condition(name, "<=", m["hi"], m["missing"]))
        if m["in"] is not None:
            out.append(Condition(name, "in", tuple(sorted(m["in"] - m["out"])), m["missing"]))
        elif m["out"]:
            out.append(Condition(name, "not in", tuple(sorted(m["out"])), m["missing"],
                                 tuple(sorted((m["branch"] or set()) - m["out"]))))
    return tuple(out)


def node_conditions(model, node: int,
                    categories: dict[str, list[str]] | None = None) -> tuple[Condition, ...]:
    """The merged conditions a record meets on its way to ``node`` (any live node, or one
    that died since the last :meth:`TreeClassifier.learn`; for an alternate subtree's
    root, the conditions of the node it grows beside)."""
    return merge_conditions(path_steps(model, node, categories or {}), model.feature_names)


def drift_state(node_i: np.ndarray, leaf: int, root: int) -> tuple[str, int | None]:
    """``watching`` when an alternate grows beside the leaf or a node above it, else
    ``replaced`` when the leaf lies in a subtree swapped in (at the latest such record),
    else ``stable``."""
    watching = False
    replaced = None
    n = leaf
    while n >= 0:
        watching = watching or node_i[n, ALT] >= 0
        if node_i[n, SWAPPED] >= 0:
            replaced = max(replaced or 0, int(node_i[n, SWAPPED]))
        if n == root:
            break
        n = int(node_i[n, PARENT])
    if watching:
        return "watching", replaced
    return ("replaced", replaced) if replaced is not None else ("stable", None)
