"""The tree as IF/THEN rules: one rule per leaf, path conditions merged per feature.

Contents
--------
Condition, Rule
    Plain data. A condition is a feature/operator/value triple (operators ``<=``, ``>``,
    ``in``, ``not in``) plus ``missing``: whether a record with no value for the feature
    satisfies it (missing values follow the heaviest branch, so this is exact).
extract_rules(model, categories) -> list[Rule]
    All leaves of a :class:`stream.classifier.TreeClassifier`, in a stable order.
rule_id(leaf) -> str
    The id of the rule a leaf node stands for; ``Scored.leaf`` tells which rule fired.
rules_payload(rules, header) / rules_from_payload(payload)
    JSON form (for snapshots and other tools) and back.
render_text(rules, header) -> str
    Aligned text for people; a pure function with fixed decimals and a stable order.

The rules partition the input space: every record, missing values included, satisfies
the conditions of exactly one rule, the one whose leaf scores it.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Sequence

import numpy as np

from .tables import (ALT, BRANCH, CHILD_START, CREATED, DEPTH, EQUALS, FEATURE, HITS, KIND,
                     LEAF, MC_CORRECT, MULTIWAY, N_CHILDREN, NB_CORRECT, NUMERIC, PARENT,
                     SCORED, SLOT, SWAPPED, THRESHOLD, WEIGHT)

LEAF_MODEL_NAMES = {0: "majority", 1: "naive_bayes", 2: "adaptive"}


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


@dataclasses.dataclass(frozen=True)
class Rule:
    """One leaf as a rule: conditions, the class it predicts and the evidence behind it."""

    id: str
    conditions: tuple[Condition, ...]
    predict: str | None
    confidence: float
    coverage: float
    records: float
    class_counts: dict[str, float]
    scored: int
    hits: int
    depth: int
    created_at: int
    leaf_model: str
    active: bool
    drift: str = "stable"
    replaced_at: int | None = None
    estimate: dict | None = None

    @property
    def accuracy(self) -> float | None:
        """Share of the records this leaf scored that it scored right (since created)."""
        return self.hits / self.scored if self.scored else None

    def to_dict(self) -> dict:
        return {"id": self.id, "conditions": [c.to_dict() for c in self.conditions],
                "predict": self.predict, "confidence": _round(self.confidence),
                "coverage": _round(self.coverage), "records": _round(self.records, 3),
                "class_counts": {k: _round(v, 3) for k, v in self.class_counts.items()},
                "scored": self.scored, "hits": self.hits, "accuracy": _round(self.accuracy),
                "depth": self.depth, "created_at": self.created_at,
                "leaf_model": self.leaf_model, "active": self.active, "drift": self.drift,
                "replaced_at": self.replaced_at, "estimate": self.estimate}

    @classmethod
    def from_dict(cls, data: dict) -> "Rule":
        return cls(id=data["id"],
                   conditions=tuple(Condition.from_dict(c) for c in data["conditions"]),
                   predict=data["predict"], confidence=data["confidence"],
                   coverage=data["coverage"], records=data["records"],
                   class_counts=dict(data["class_counts"]), scored=data["scored"],
                   hits=data["hits"], depth=data["depth"], created_at=data["created_at"],
                   leaf_model=data["leaf_model"], active=data["active"],
                   drift=data.get("drift", "stable"), replaced_at=data.get("replaced_at"),
                   estimate=data.get("estimate"))


def _round(value: float | None, digits: int = 6) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), digits)


def rule_id(leaf: int) -> str:
    """Id of the rule that leaf node ``leaf`` stands for."""
    return f"R{int(leaf)}"


# ---------------------------------------------------------------- extraction

def _heaviest(node_i: np.ndarray, node_f: np.ndarray, table: np.ndarray, n: int) -> int:
    start, count = node_i[n, CHILD_START], node_i[n, N_CHILDREN]
    best, weight = -1, -1.0
    for c in table[start:start + count]:
        if c >= 0 and node_f[c, WEIGHT] > weight:
            best, weight = int(c), node_f[c, WEIGHT]
    return best


def _steps(model, leaf: int, categories: dict[str, list[str]]) -> list[tuple]:
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
    return merge_conditions(_steps(model, node, categories or {}), model.feature_names)


def conditions_text(conditions: Sequence[Condition]) -> str:
    """Conditions on one line, ``AND``-joined; ``(everything)`` when there are none."""
    if not conditions:
        return "(everything)"
    return " AND ".join(format_condition(group) for group in _grouped(conditions))


def extract_rules(model, categories: dict[str, list[str]] | None = None) -> list[Rule]:
    """One :class:`Rule` per leaf, sorted by predicted class, then coverage (largest
    first), then id."""
    categories = categories or {}
    t = model.tables_
    node_i, node_f = t.node_i, t.node_f
    classes = model.classes_
    leaves = [int(n) for n in model.main_nodes() if node_i[n, KIND] == LEAF]
    totals = {n: float(t.counts[n, :len(classes)].sum()) for n in leaves}
    grand = sum(totals.values())
    leaf_model = model.settings.leaf_model
    rules = []
    for n in leaves:
        counts = t.counts[n, :len(classes)]
        total = totals[n]
        if total > 0:
            # ties broken by label order, as the kernels do
            top = min(range(len(classes)), key=lambda k: (-counts[k], classes[k]))
            predict, confidence = classes[top], float(counts[top] / total)
        else:
            predict, confidence = None, 0.0
        active = bool(node_i[n, SLOT] >= 0)
        model_name = "majority"
        if active and leaf_model == "naive_bayes":
            model_name = "naive_bayes"
        elif active and leaf_model == "adaptive" and \
                node_f[n, NB_CORRECT] >= node_f[n, MC_CORRECT] and total > 0:
            model_name = "naive_bayes"
        drift, replaced_at = _drift_state(node_i, n, model.root)
        rules.append(Rule(
            id=rule_id(n),
            conditions=merge_conditions(_steps(model, n, categories), model.feature_names),
            predict=predict, confidence=confidence,
            coverage=total / grand if grand > 0 else 0.0, records=total,
            class_counts={classes[k]: float(counts[k]) for k in range(len(classes))},
            scored=int(node_f[n, SCORED]), hits=int(node_f[n, HITS]),
            depth=int(node_i[n, DEPTH]), created_at=int(node_i[n, CREATED]),
            leaf_model=model_name, active=active, drift=drift, replaced_at=replaced_at))
    return sort_rules(rules)


def _drift_state(node_i: np.ndarray, leaf: int, root: int) -> tuple[str, int | None]:
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


def sort_rules(rules: list[Rule]) -> list[Rule]:
    """Stable display order: predicted class label, coverage descending, then id number."""
    return sorted(rules, key=lambda r: (r.predict is None, r.predict or "", -r.coverage,
                                        int(r.id[1:]) if r.id[1:].isdigit() else 0))


# ---------------------------------------------------------------- JSON form

def rules_payload(rules: Sequence[Rule], header: dict) -> dict:
    """JSON-able form: ``header`` (target, classes, records, ...) plus the rules."""
    return {**header, "rule_count": len(rules), "rules": [r.to_dict() for r in rules]}


def rules_from_payload(payload: dict) -> list[Rule]:
    """Rules back from :func:`rules_payload` output (e.g. a snapshot file)."""
    return [Rule.from_dict(r) for r in payload.get("rules", [])]


# ---------------------------------------------------------------- text form

def format_number(value: float) -> str:
    """Compact, fixed rendering of a threshold: up to 4 decimals, trailing zeros cut."""
    if value == 0:
        return "0"
    text = f"{value:.4f}".rstrip("0").rstrip(".")
    if text in ("0", "-0"):
        return f"{value:.3g}"
    return text


def format_condition(conditions: Sequence[Condition]) -> str:
    """One feature's merged conditions as text: ``12.5 < supply_temp <= 30.1``."""
    name = conditions[0].feature
    lo = next((c.value for c in conditions if c.op == ">"), None)
    hi = next((c.value for c in conditions if c.op == "<="), None)
    sets = [c for c in conditions if c.op in ("in", "not in")]
    if sets and sets[0].branch:
        c = sets[0]
        shown = c.branch[0] if len(c.branch) == 1 else "{" + ", ".join(c.branch) + "}"
        text = f"{name} {'=' if len(c.branch) == 1 else 'in'} {shown}"
        text += "  (or missing, or a new value)" if c.missing else "  (or a new value)"
        return text
    if sets:
        c = sets[0]
        labels = ", ".join(c.value)
        text = f"{name} {'=' if c.op == 'in' and len(c.value) == 1 else c.op} "
        text += labels if c.op == "in" and len(c.value) == 1 else "{" + labels + "}"
    elif lo is not None and hi is not None:
        text = f"{format_number(lo)} < {name} <= {format_number(hi)}"
    elif lo is not None:
        text = f"{name} > {format_number(lo)}"
    else:
        text = f"{name} <= {format_number(hi)}"
    if conditions[0].missing:
        text += "  (or missing)"
    return text


def _grouped(conditions: Sequence[Condition]) -> list[list[Condition]]:
    groups: dict[str, list[Condition]] = {}
    for c in conditions:
        groups.setdefault(c.feature, []).append(c)
    return list(groups.values())


def _count(value: float) -> str:
    return f"{value:,.0f}"


def render_text(rules: Sequence[Rule], header: dict) -> str:
    """Rules as aligned text. ``header`` needs ``target``; ``records``, ``accuracy`` and
    ``written_at`` are shown when present."""
    target = header.get("target", "target")
    lines = [f"sapwood rules for {target}"]
    facts = []
    if header.get("records") is not None:
        facts.append(f"{_count(header['records'])} records learned")
    if header.get("shown") is not None:
        facts.append(f"the {len(rules)} rules covering the most records")
    else:
        facts.append(f"{len(rules)} rule" + ("s" if len(rules) != 1 else ""))
    if header.get("accuracy") is not None:
        facts.append(f"prequential accuracy {100 * header['accuracy']:.1f}%")
    if header.get("rmse") is not None:
        facts.append(f"prequential RMSE {format_number(header['rmse'])}")
    if header.get("written_at"):
        facts.append(str(header["written_at"]))
    lines.append(" | ".join(facts))
    lines.append("")
    width = max((len(r.id) for r in rules), default=2) + 2
    pad = " " * width
    for r in rules:
        groups = _grouped(r.conditions)
        if not groups:
            lines.append(f"{r.id:<{width}}ALWAYS")
        for i, group in enumerate(groups):
            lead = f"{r.id:<{width}}IF   " if i == 0 else f"{pad}AND  "
            lines.append(lead + format_condition(group))
        extra = []
        if r.estimate is not None:
            lines.append(f"{pad}THEN {target} = {r.estimate.get('shown', '?')}")
            detail = f"coverage {100 * r.coverage:.1f}%, {_count(r.records)} records"
            if r.estimate.get("mae") is not None:
                extra.append(f"mean absolute error {format_number(r.estimate['mae'])} over "
                             f"{_count(r.scored)} scored")
        else:
            outcome = "(no records yet)" if r.predict is None else f"{target} = {r.predict}"
            lines.append(f"{pad}THEN {outcome}")
            detail = (f"confidence {100 * r.confidence:.1f}%, coverage "
                      f"{100 * r.coverage:.1f}%, {_count(r.records)} records")
            split = " / ".join(f"{label} {_count(v)}" for label, v in r.class_counts.items()
                               if v >= 0.5)
            if split:
                detail += f" ({split})"
            if r.accuracy is not None:
                extra.append(f"scored right {100 * r.accuracy:.1f}% of {_count(r.scored)}")
        lines.append(f"{pad}     {detail}")
        if r.leaf_model == "naive_bayes" and r.estimate is None:
            extra.append("naive Bayes refines within the rule")
        if not r.active:
            extra.append("not growing")
        if r.drift == "watching":
            extra.append("drift: alternate growing")
        elif r.drift == "replaced":
            extra.append(f"drift: regrown at record {_count(r.replaced_at)}")
        if extra:
            lines.append(f"{pad}     " + "; ".join(extra))
        lines.append("")
    lines.append("Learned rules describe the data seen so far. They are advisory, not safety "
                 "interlocks: defer to site safety systems, local codes and licensed practice.")
    return "\n".join(lines) + "\n"
