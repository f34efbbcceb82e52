"""The class of concern first: which rules lead a view, and what each one catches.

Operators read rules to learn which conditions lead to a fault, an alarm or a reject, so
every view puts the rules predicting that class (the *class of concern*) first, ordered by
how much of the class they catch, then by how often they are right; the other rules follow
in their usual order. For a numeric target the concern may be ``high`` or ``low``: the rules
predicting the highest (or lowest) values first.

concern_of(header, rules, override)  the class of concern of a rule set
catches(rules, concern)              per rule: share of the concern's records it holds
concern_order(rules, concern)        the display order, concern first
top_rules(rules, concern, n)         the n rules a short listing keeps
"""

from __future__ import annotations

from typing import Sequence

from .rule import Rule, sort_rules

NUMERIC_CONCERNS = ("high", "low")


def concern_of(header: dict, rules: Sequence[Rule], override: str | None = None) -> str | None:
    """The class of concern: ``override`` (a view's ``--concern``), else the one the run
    recorded in ``header``; for rule sets written before runs recorded one, the rarest
    class among the rules' records. None when there is none yet (fewer labels than the
    run waits for) or the target is numeric and no ``high``/``low`` was asked for."""
    if override is not None:
        return override
    if "concern" in header:
        return header["concern"]
    if any(r.estimate is not None for r in rules):
        return None
    totals: dict[str, float] = {}
    for r in rules:
        for label, count in r.class_counts.items():
            totals[label] = totals.get(label, 0.0) + count
    seen = [(count, label) for label, count in totals.items() if count > 0]
    return min(seen)[1] if len(seen) > 1 else None


def catches(rules: Sequence[Rule], concern: str | None) -> dict[str, float]:
    """Rule id -> the share of all the concern's records (over these rules) that the rule
    holds: the recall share it would have as an alarm rule. Empty when no rule holds any."""
    if concern is None:
        return {}
    held = {r.id: float(r.class_counts.get(concern, 0.0)) for r in rules}
    total = sum(held.values())
    return {k: v / total for k, v in held.items()} if total > 0 else {}


def precision(rule: Rule, concern: str) -> float:
    """Share of the rule's records that are of the class of concern."""
    total = sum(rule.class_counts.values())
    return rule.class_counts.get(concern, 0.0) / total if total > 0 else 0.0


def leads(rule: Rule, concern: str | None) -> bool:
    """Whether ``rule`` predicts the class of concern."""
    return concern is not None and rule.estimate is None and rule.predict == concern


def concern_order(rules: Sequence[Rule], concern: str | None) -> list[Rule]:
    """Rules predicting the class of concern first (most of the class caught, then most
    often right, then id), the rest in :func:`sort_rules` order. A numeric target with
    ``high``/``low`` orders by predicted value; otherwise the order is unchanged."""
    rules = list(rules)
    if concern in NUMERIC_CONCERNS and any(r.estimate is not None for r in rules):
        sign = -1.0 if concern == "high" else 1.0
        return sorted(rules, key=lambda r: (r.estimate is None,
                                            sign * _mean(r), _number(r.id)))
    if concern is None:
        return rules
    share = catches(rules, concern)
    first = sorted((r for r in rules if leads(r, concern)),
                   key=lambda r: (-share.get(r.id, 0.0), -precision(r, concern),
                                  _number(r.id)))
    rest = sort_rules([r for r in rules if not leads(r, concern)])
    return first + rest


def top_rules(rules: Sequence[Rule], concern: str | None, n: int) -> list[Rule]:
    """The ``n`` rules a short listing shows, in display order: those predicting the class
    of concern first (by what they catch), then the others covering the most records."""
    ordered = concern_order(rules, concern)
    if concern is None or concern in NUMERIC_CONCERNS:
        kept = {id(r) for r in sorted(ordered, key=lambda r: -r.coverage)[:n]} \
            if concern is None else {id(r) for r in ordered[:n]}
        return [r for r in ordered if id(r) in kept]
    first = [r for r in ordered if leads(r, concern)]
    rest = sorted((r for r in ordered if not leads(r, concern)), key=lambda r: -r.coverage)
    kept = {id(r) for r in (first + rest)[:n]}
    return [r for r in ordered if id(r) in kept]


def _mean(rule: Rule) -> float:
    value = (rule.estimate or {}).get("mean")
    return float(value) if isinstance(value, (int, float)) else 0.0


def _number(rule_id: str) -> int:
    return int(rule_id[1:]) if rule_id[1:].isdigit() else 0
