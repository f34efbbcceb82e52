"""A rule: one leaf of a tree, its merged conditions and the evidence behind it.

Rule
    Plain data, the same for both tasks (a regression rule carries ``estimate``).
rule_id(leaf) -> str, rule_ids(leaves) -> array
    The id of the rule a leaf node stands for; ``Scored.leaf`` tells which rule fired.
sort_rules(rules)
    The stable display order.
rules_payload(rules, header) / rules_from_payload(payload)
    JSON form (for snapshots and other tools) and back.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Sequence

import numpy as np

from stream.tree.paths import Condition

from .bulk import in_bulk


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


def rule_ids(leaves: np.ndarray) -> np.ndarray:
    """``rule_id`` of each leaf, as an object array (made once per distinct leaf)."""
    distinct, which = np.unique(np.asarray(leaves), return_inverse=True)
    return np.array([rule_id(leaf) for leaf in distinct], dtype=object)[which]


def sort_rules(rules: list[Rule]) -> list[Rule]:
    """Stable display order: predicted class label, coverage descending, then id number."""
    return sorted(rules, key=lambda r: (r.predict is None, r.predict or "", -r.coverage,
                                        int(r.id[1:]) if r.id[1:].isdigit() else 0))


def rules_payload(rules: Sequence[Rule], header: dict) -> dict:
    """JSON-able form: ``header`` (target, classes, records, ...) plus the rules."""
    return {**header, "rule_count": len(rules), "rules": [r.to_dict() for r in rules]}


@in_bulk
def rules_from_payload(payload: dict) -> list[Rule]:
    """Rules back from :func:`rules_payload` output (e.g. a snapshot file)."""
    return [Rule.from_dict(r) for r in payload.get("rules", [])]
