"""A rule's conditions as a region of the input space, and how regions relate.

Inside: :class:`Span` (one feature's constraint: a numeric interval ``lo < x <= hi`` or
a category set, plus whether missing values are admitted), :func:`region_of` (a rule's
conditions merged per feature into spans), :func:`shape_of`, :func:`overlaps` and
:func:`within`. Diffs (:mod:`stream.rules.diff`), simplification (:mod:`stream.rules.simplify`) and
matching records against snapshot rules (:mod:`stream.views.explain`) build on these.
"""

from __future__ import annotations

import dataclasses
from typing import Sequence

from stream.errors import ConfigError
from stream.tree.paths import Condition


@dataclasses.dataclass(frozen=True)
class Span:
    """One feature's constraint: numeric ``lo < x <= hi`` (None = open) or a category set."""

    kind: str                      # "num" or "cat"
    lo: float | None = None
    hi: float | None = None
    op: str | None = None          # "in" / "not in" for categories
    labels: frozenset = frozenset()
    missing: bool = False

    def shape(self) -> tuple:
        if self.kind == "num":
            return ("num", self.lo is not None, self.hi is not None)
        return ("cat", self.op)


def region_of(conditions: Sequence[Condition]) -> dict[str, Span]:
    """Conditions merged per feature into one :class:`Span` each.

    Several bounds on one feature keep the tightest; ``in`` sets intersect, ``not in``
    sets unite, and ``in`` minus ``not in`` when both occur. A feature admits missing
    values only if every condition on it does.
    """
    grouped: dict[str, list[Condition]] = {}
    for c in conditions:
        grouped.setdefault(c.feature, []).append(c)
    region = {}
    for feature, group in grouped.items():
        missing = all(c.missing for c in group)
        if all(c.op in ("<=", ">") for c in group):
            lo = max((float(c.value) for c in group if c.op == ">"), default=None)
            hi = min((float(c.value) for c in group if c.op == "<="), default=None)
            region[feature] = Span("num", lo=lo, hi=hi, missing=missing)
            continue
        inside = None
        outside: set = set()
        for c in group:
            if c.op == "in":
                labels = set(c.value)
                inside = labels if inside is None else inside & labels
            elif c.op == "not in":
                outside |= set(c.value)
            else:
                raise ConfigError(f"rule condition on {feature!r} mixes numeric and category "
                                  f"tests, got operator {c.op!r}")
        if inside is not None:
            region[feature] = Span("cat", op="in", labels=frozenset(inside - outside),
                                   missing=missing)
        else:
            region[feature] = Span("cat", op="not in", labels=frozenset(outside),
                                   missing=missing)
    return region


def shape_of(region: dict[str, Span]) -> tuple:
    """Which features a region tests and how; equal shapes may be the same rule moved."""
    return tuple(sorted((feature, span.shape()) for feature, span in region.items()))


def _spans_meet(a: Span, b: Span, missing: bool) -> bool:
    if missing and a.missing and b.missing:
        return True
    if a.kind != b.kind:
        return True  # cannot happen for one schema; never claim a region is empty
    if a.kind == "num":
        lo = max((v for v in (a.lo, b.lo) if v is not None), default=None)
        hi = min((v for v in (a.hi, b.hi) if v is not None), default=None)
        return lo is None or hi is None or lo < hi
    if a.op == "in" and b.op == "in":
        return bool(a.labels & b.labels)
    if a.op == "in":
        return bool(a.labels - b.labels)
    if b.op == "in":
        return bool(b.labels - a.labels)
    return True  # two "not in" sets leave every other label


def overlaps(a: dict[str, Span], b: dict[str, Span], missing: bool = True) -> bool:
    """True when some record satisfies both regions (with ``missing=False``: some record
    with every value present)."""
    return all(_spans_meet(a[f], b[f], missing) for f in a.keys() & b.keys())


def _span_within(inner: Span, outer: Span, missing: bool) -> bool:
    if missing and inner.missing and not outer.missing:
        return False
    if inner.kind != outer.kind:
        return False
    if inner.kind == "num":
        low_ok = outer.lo is None or (inner.lo is not None and inner.lo >= outer.lo)
        high_ok = outer.hi is None or (inner.hi is not None and inner.hi <= outer.hi)
        return low_ok and high_ok
    if inner.op == "in" and outer.op == "in":
        return inner.labels <= outer.labels
    if inner.op == "in":
        return not inner.labels & outer.labels
    if outer.op == "in":
        return False  # "not in" admits labels never seen, which no "in" set lists
    return inner.labels >= outer.labels


def within(inner: dict[str, Span], outer: dict[str, Span], missing: bool = True) -> bool:
    """True when every record satisfying ``inner`` also satisfies ``outer``.

    With ``missing=False`` only records without missing values count: where missing
    values go follows the heavier branch and can change without any split.
    """
    return all(f in inner and _span_within(inner[f], outer[f], missing) for f in outer)

