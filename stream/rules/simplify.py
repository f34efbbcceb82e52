"""Shorter rules that decide exactly as the tree does: for tickets, reports and shift notes.

Inside: :func:`tidy` (one rule: bounds merged per feature, conditions that exclude
nothing dropped) and :func:`simplify` (a whole rule set: tidy, then join rules that
predict the same class and differ on one feature only, then sort by class and coverage).

Why joining is exact: the rules of one tree partition the input space (every record
satisfies exactly one rule). Two rules with the same outcome, identical conditions on
every feature but one, and on that feature two pieces that join into one interval or
one category set, cover together exactly the region the joined rule covers. So the
simplified set still partitions the space and gives every record the same predicted
class as the leaf that scores it. When the pieces join into "any value, or missing",
the condition is redundant and dropped. What the joined rule cannot keep: one leaf's
own statistics (counts, confidence and coverage are summed over its pieces, and a
naive Bayes refinement inside a leaf is not a rule condition). Its id lists the ids of
the rules it joins ("R12+R15").
"""

from __future__ import annotations

import dataclasses
from typing import Sequence

from stream.tree.paths import Condition

from .regions import Span, region_of
from .rule import Rule, sort_rules


def _conditions(region: dict[str, Span], order: Sequence[str]) -> tuple[Condition, ...]:
    out: list[Condition] = []
    for feature in order:
        span = region[feature]
        if span.kind == "num":
            if span.lo is not None:
                out.append(Condition(feature, ">", span.lo, span.missing))
            if span.hi is not None:
                out.append(Condition(feature, "<=", span.hi, span.missing))
        else:
            out.append(Condition(feature, span.op, tuple(sorted(span.labels)), span.missing))
    return tuple(out)


def _always_true(span: Span) -> bool:
    # "any value or missing": no bound at all, or "not in" an empty set
    if not span.missing:
        return False
    if span.kind == "num":
        return span.lo is None and span.hi is None
    return span.op == "not in" and not span.labels


def _order(rule: Rule) -> list[str]:
    seen: list[str] = []
    for c in rule.conditions:
        if c.feature not in seen:
            seen.append(c.feature)
    return seen


def tidy(rule: Rule) -> Rule:
    """``rule`` with its conditions merged per feature (tightest bounds, ``in`` minus
    ``not in``) and conditions that admit every value and missing dropped.

    Rules read off a tree are already merged; this matters for rules from other
    sources (hand-edited JSON, another tool). The ``branch`` display hint of a
    ``not in`` condition is kept when the condition is unchanged.
    """
    region = region_of(rule.conditions)
    order = [f for f in _order(rule) if not _always_true(region[f])]
    return dataclasses.replace(rule, conditions=_hinted(_conditions(region, order),
                                                         rule.conditions))


def _hinted(conditions: tuple[Condition, ...],
            before: Sequence[Condition]) -> tuple[Condition, ...]:
    """Keep the ``branch`` display hint of conditions that did not change."""
    hints = {(c.feature, c.op, c.value, c.missing): c.branch for c in before if c.branch}
    return tuple(dataclasses.replace(c, branch=hints.get(
        (c.feature, c.op, c.value, c.missing), ())) for c in conditions)


def _join(a: Span, b: Span) -> Span | None:
    """One span covering exactly ``a`` or ``b``, or None if no single condition can."""
    if a.kind != b.kind:
        return None
    missing = a.missing or b.missing
    if a.kind == "num":
        first, second = sorted((a, b), key=lambda s: float("-inf") if s.lo is None else s.lo)
        end_first = float("inf") if first.hi is None else first.hi
        start_second = float("-inf") if second.lo is None else second.lo
        if start_second > end_first:
            return None  # a gap between the pieces
        highs = [s.hi for s in (a, b)]
        hi = None if None in highs else max(highs)
        joined = Span("num", lo=first.lo, hi=hi, missing=missing)
        if joined.lo is None and joined.hi is None and not missing:
            return None  # "any present value" has no condition of its own
        return joined
    if a.op == "in" and b.op == "in":
        return Span("cat", op="in", labels=a.labels | b.labels, missing=missing)
    if a.op == "not in" and b.op == "not in":
        labels = a.labels & b.labels
    else:
        inside, outside = (a, b) if a.op == "in" else (b, a)
        labels = outside.labels - inside.labels
    if not labels and not missing:
        return None
    return Span("cat", op="not in", labels=labels, missing=missing)


def _combine(a: Rule, b: Rule, region: dict[str, Span], order: list[str]) -> Rule:
    counts = {k: a.class_counts.get(k, 0.0) + b.class_counts.get(k, 0.0)
              for k in dict.fromkeys([*a.class_counts, *b.class_counts])}
    records = a.records + b.records
    confidence = counts.get(a.predict, 0.0) / records if records > 0 else 0.0
    return Rule(
        id=f"{a.id}+{b.id}", conditions=_hinted(_conditions(region, order), a.conditions),
        predict=a.predict,
        confidence=confidence, coverage=a.coverage + b.coverage, records=records,
        class_counts=counts, scored=a.scored + b.scored, hits=a.hits + b.hits,
        depth=min(a.depth, b.depth), created_at=min(a.created_at, b.created_at),
        leaf_model=a.leaf_model if a.leaf_model == b.leaf_model else "mixed",
        active=a.active or b.active)


def _try_join(a: Rule, b: Rule) -> Rule | None:
    if a.predict is None or a.predict != b.predict:
        return None
    ra, rb = region_of(a.conditions), region_of(b.conditions)
    if ra.keys() != rb.keys():
        return None
    differing = [f for f in ra if ra[f] != rb[f]]
    if len(differing) != 1:
        return None
    feature = differing[0]
    joined = _join(ra[feature], rb[feature])
    if joined is None:
        return None
    region = dict(ra)
    order = _order(a)
    if _always_true(joined):
        del region[feature]
        order.remove(feature)
    else:
        region[feature] = joined
    return _combine(a, b, region, order)


@dataclasses.dataclass(frozen=True)
class Simplified:
    """A simplified rule (id ``S1``, ``S2``, ... in display order) and the ids of the
    tree's rules it stands for."""

    rule: Rule
    sources: tuple[str, ...]


def simplify(rules: Sequence[Rule]) -> list[Simplified]:
    """Tidy each rule, join pairs that differ on one feature and predict the same class
    (until no pair joins), and sort by class, then coverage (largest first).

    The input must be the rules of one tree (a partition); see the module notes.
    """
    joined = _join_all(rules)
    return [Simplified(dataclasses.replace(rule, id=f"S{k}"),
                       tuple(sorted(rule.id.split("+"), key=_id_order)))
            for k, rule in enumerate(joined, 1)]


def _id_order(rule_id: str) -> tuple:
    digits = rule_id[1:]
    return (0, int(digits), rule_id) if digits.isdigit() else (1, 0, rule_id)


def _join_all(rules: Sequence[Rule]) -> list[Rule]:
    current = [tidy(r) for r in rules]
    joined = True
    while joined:
        joined = False
        buckets: dict[tuple, list[int]] = {}
        for k, rule in enumerate(current):
            region = region_of(rule.conditions)
            for feature in region:
                rest = tuple(sorted((f, s) for f, s in region.items() if f != feature))
                buckets.setdefault((rule.predict, feature, rest), []).append(k)
        used: set[int] = set()
        result: list[Rule] = []
        for members in buckets.values():
            free = [k for k in members if k not in used]
            for x in range(len(free)):
                if free[x] in used:
                    continue
                for y in range(x + 1, len(free)):
                    if free[y] in used:
                        continue
                    merged = _try_join(current[free[x]], current[free[y]])
                    if merged is not None:
                        used.update((free[x], free[y]))
                        result.append(merged)
                        joined = True
                        break
        result.extend(r for k, r in enumerate(current) if k not in used)
        current = result
    return sort_rules(current)
