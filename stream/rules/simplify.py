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
import math
from typing import Sequence

from stream.tree.paths import Condition

from .bulk import in_bulk
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
    return _tidied(rule)[0]


def _tidied(rule: Rule) -> tuple[Rule, dict[str, Span]]:
    """:func:`tidy` and the tidied rule's region."""
    region = region_of(rule.conditions)
    if _already_tidy(rule.conditions, region):
        return rule, region
    order = [f for f in _order(rule) if not _always_true(region[f])]
    tidied = dataclasses.replace(rule, conditions=_hinted(_conditions(region, order),
                                                           rule.conditions))
    return tidied, {f: region[f] for f in order}


def _already_tidy(conditions: Sequence[Condition], region: dict[str, Span]) -> bool:
    """Whether :func:`tidy` would give ``conditions`` back unchanged: one run of
    conditions per feature, a numeric one as ``>`` then ``<=``, a category one as a
    single test of sorted labels, one missing flag per feature, none always true (rules
    read off a tree are like this)."""
    done: set[str] = set()
    k = 0
    while k < len(conditions):
        c = conditions[k]
        if c.feature in done or _always_true(region[c.feature]):
            return False
        done.add(c.feature)
        if c.op in ("in", "not in"):
            if c.value != tuple(sorted(c.value)):
                return False
            k += 1
        elif type(c.value) is not float:
            return False     # tidy writes bounds as floats
        elif c.op == ">" and k + 1 < len(conditions) and conditions[k + 1].feature == c.feature:
            after = conditions[k + 1]
            if after.op != "<=" or after.missing != c.missing or type(after.value) is not float:
                return False
            k += 2
        else:
            k += 1
        if k < len(conditions) and conditions[k].feature == c.feature:
            return False
    return True


def _hinted(conditions: tuple[Condition, ...],
            before: Sequence[Condition]) -> tuple[Condition, ...]:
    """Keep the ``branch`` display hint of conditions that did not change."""
    hints = {(c.feature, c.op, c.value, c.missing): c.branch for c in before if c.branch}
    if not hints and not any(c.branch for c in conditions):
        return tuple(conditions)
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


def _try_join(a: Rule, b: Rule, ra: dict[str, Span],
              rb: dict[str, Span]) -> tuple[Rule, dict[str, Span]] | None:
    """The rule covering exactly ``a`` or ``b`` (regions ``ra``, ``rb``) and its region,
    or None if no rule can."""
    if a.predict is None or a.predict != b.predict:
        return None
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
    return _combine(a, b, region, order), region


@dataclasses.dataclass(frozen=True)
class Simplified:
    """A simplified rule (id ``S1``, ``S2``, ... in display order) and the ids of the
    tree's rules it stands for."""

    rule: Rule
    sources: tuple[str, ...]


@in_bulk
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


class _Keys:
    """Bucket keys of rules, as small integers: a rule's key per feature is (its class,
    the feature, its region on every other feature). Computed once per rule."""

    def __init__(self) -> None:
        self._ids: dict[tuple, int] = {}
        self._spans: dict[tuple, int] = {}

    def of(self, rule: Rule, region: dict[str, Span]) -> list[int]:
        spans = self._spans
        features = sorted(region)
        ids = []
        for f in features:
            span = region[f]     # a plain tuple hashes faster than the dataclass
            ids.append(spans.setdefault((f, span.kind, span.lo, span.hi, span.op,
                                         span.labels, span.missing), len(spans)))
        place = {f: i for i, f in enumerate(features)}
        keys = []
        for feature in region:   # the rule's own order: buckets come in first-seen order
            i = place[feature]
            rest = tuple(ids[:i] + ids[i + 1:])
            keys.append(self._ids.setdefault((rule.predict, feature, rest), len(self._ids)))
        return keys


def _join_all(rules: Sequence[Rule]) -> list[Rule]:
    """Join pairs until none joins.

    Each pass: rules sharing a bucket key differ on one feature at most; in bucket
    order, each free rule joins the first later free rule it can. The rules of a pass
    are in the order: those joined in the last pass (as they were made), then the others
    in their order before, i.e. by (pass made, newest first; made earlier first); a
    bucket comes where its first rule is. Two rules that stayed apart through a pass
    cannot join later, so a pass looks only at the buckets of the rules joined in the
    last one. For numeric spans of a partition only touching intervals join, so those
    are looked up by their bounds instead of trying every later rule.
    """
    keys = _Keys()
    live: dict[int, tuple[Rule, dict[str, Span], list[int], int]] = {}
    members_of: dict[int, list[int]] = {}      # bucket key -> serials (some since joined)

    def add(rule: Rule, region: dict[str, Span], made: int) -> int:
        serial = len(order_of)
        own = keys.of(rule, region)
        live[serial] = (rule, region, own, made)
        order_of.append((-made, serial))
        for key in own:
            members_of.setdefault(key, []).append(serial)
        return serial

    order_of: list[tuple[int, int]] = []
    fresh = [add(rule, region, 0) for rule, region in map(_tidied, rules)]
    made = 0
    while fresh:
        made += 1
        wanted = {key for serial in fresh for key in live[serial][2]}
        buckets = []
        for key in wanted:
            members = sorted((s for s in members_of[key] if s in live), key=order_of.__getitem__)
            members_of[key] = members
            if len(members) > 1:
                first = members[0]
                buckets.append(((order_of[first], live[first][2].index(key)), members))
        buckets.sort(key=lambda item: item[0])
        used: set[int] = set()
        joined: list[tuple[Rule, dict[str, Span]]] = []
        current = {s: live[s][0] for _, members in buckets for s in members}
        regions = {s: live[s][1] for s in current}
        for _, members in buckets:
            free = [s for s in members if s not in used]
            if len(free) < 2:
                continue
            for x, y in _pairs(free, regions, used):
                found = _try_join(current[x], current[y], regions[x], regions[y])
                if found is not None:
                    used.update((x, y))
                    joined.append(found)
        for serial in used:
            del live[serial]
        fresh = [add(rule, region, made) for rule, region in joined]
    return sort_rules([live[s][0] for s in sorted(live, key=order_of.__getitem__)])


def _pairs(free: list[int], regions: dict[int, dict], used: set[int]):
    """The pairs to try in one bucket, in the order of the plain scan (each free rule
    with every later free one), skipping pairs that cannot join: numeric intervals of one
    feature that neither touch nor overlap. ``used`` is read as pairs are taken."""
    feature = _differing_numeric(free, regions)
    if feature is None:
        for i, x in enumerate(free):
            for y in free[i + 1:]:
                if x not in used and y not in used:
                    yield x, y
        return
    spans = {k: regions[k][feature] for k in free}
    by_lo: dict[float, list[int]] = {}
    by_hi: dict[float, list[int]] = {}
    for k in free:
        if spans[k].lo is not None:
            by_lo.setdefault(spans[k].lo, []).append(k)
        if spans[k].hi is not None:
            by_hi.setdefault(spans[k].hi, []).append(k)
    position = {k: i for i, k in enumerate(free)}
    for x in free:
        if x in used:
            continue
        span = spans[x]
        touching = [*by_lo.get(span.hi, ()), *by_hi.get(span.lo, ())]
        later = sorted((position[y], y) for y in touching
                       if position[y] > position[x] and y not in used)
        for _, y in later:
            if x in used:
                break
            yield x, y


def _differing_numeric(free: list[int], regions: dict[int, dict]) -> str | None:
    """The one feature on which a bucket's numeric spans differ, if the bucket's spans
    on it are disjoint intervals (a partition); None when the plain scan is needed."""
    first = regions[free[0]]
    features = [f for f in first if f in regions[free[1]]
                and regions[free[1]][f] != first[f]]
    if len(features) != 1 or first[features[0]].kind != "num":
        return None
    feature = features[0]
    spans = []
    for k in free:
        span = regions[k].get(feature)
        if span is None or span.kind != "num" or regions[k].keys() != first.keys():
            return None
        spans.append((-math.inf if span.lo is None else span.lo,
                      math.inf if span.hi is None else span.hi))
    spans.sort()
    if any(spans[i][1] > spans[i + 1][0] for i in range(len(spans) - 1)):
        return None   # overlapping intervals: not a partition, try every pair
    return feature
