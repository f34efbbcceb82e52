"""Thresholds as people read them: in the resolution the data carry.

A split threshold lies between two values the tree saw (``door_open_min <= 13.3636``
between 13 and 14 minutes). On values with ``d`` decimals, ``x <= t`` and ``x > t``
select the same records as ``x <= floor_d(t)`` and ``x > floor_d(t)``, so the text forms
print ``floor_d(t)`` (``door_open_min <= 13``), which no record tells apart from ``t``.
A field whose values carry more than six decimals (a computed value) gets four
significant digits instead. JSON keeps the exact value; ``Thresholds(exact=True)`` (the
views' ``--exact``) prints it in full.

The decimals per field come from the run (``decimals`` in a snapshot's header or a model
file), estimated from an even sample of each batch's values; rule sets without them keep
the fixed rendering of :func:`format_number`.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Mapping

from stream.resolution import FINE, slack

SIGNIFICANT = 4
"""Significant digits of a threshold on a field finer than the decimals told apart."""


@dataclasses.dataclass(frozen=True)
class Thresholds:
    """How the text forms print a threshold: per field ``decimals`` (from the run; a
    field not named keeps the fixed rendering), or ``exact`` in full."""

    decimals: Mapping[str, int] = dataclasses.field(default_factory=dict)
    exact: bool = False

    @classmethod
    def of(cls, header: dict | None, exact: bool = False) -> "Thresholds":
        """The style for rules whose header (snapshot, model) may carry ``decimals``."""
        found = (header or {}).get("decimals")
        return cls(dict(found) if isinstance(found, dict) else {}, exact)

    def number(self, feature: str, value: float) -> str:
        """``value``, a threshold on ``feature``, as the text forms print it."""
        value = float(value)
        if self.exact:
            return repr(value).removesuffix(".0")
        places = self.decimals.get(feature)
        if places is None or not math.isfinite(value):
            return format_number(value)
        if places >= FINE:
            return _significant(value, SIGNIFICANT)
        return on_grid(value, int(places))

    def move(self, feature: str, old: float, new: float) -> str:
        """A threshold's move as ``12 -> 13 (+1)``, the change taken between the printed
        values; ``(the same at the data's resolution)`` when they print alike."""
        before, after = self.number(feature, old), self.number(feature, new)
        if before == after and float(old) != float(new):
            return f"{before} -> {after} (the same at the data's resolution)"
        places = self.decimals.get(feature)
        if self.exact or places is None or places >= FINE:
            by = float(new) - float(old)
            shown = repr(by).removesuffix(".0") if self.exact else format_number(by)
        else:
            by = float(after) - float(before)
            shown = f"{by:.{int(places)}f}"
        return f"{before} -> {after} ({'+' if by > 0 else ''}{shown})"

    @classmethod
    def of_both(cls, old: dict | None, new: dict | None, exact: bool = False) -> "Thresholds":
        """The style for a comparison: per field the finer of the two sides' decimals."""
        a, b = cls.of(old).decimals, cls.of(new).decimals
        merged = {k: max(a.get(k, 0), b.get(k, 0)) for k in set(a) & set(b)}
        return cls(merged, exact)


def format_number(value: float) -> str:
    """Compact, fixed rendering of a threshold: up to 4 decimals, trailing zeros cut."""
    if value == 0:
        return "0"
    text = f"{value:.4f}".rstrip("0").rstrip(".")
    if text in ("0", "-0"):
        return f"{value:.3g}"
    return text


def on_grid(value: float, places: int) -> str:
    """The largest value with ``places`` decimals not above ``value`` (within the
    :func:`~stream.resolution.slack` of a whole multiple, so that 0.3 stays 0.3), printed
    with those decimals."""
    scale = 10.0 ** places
    scaled = value * scale
    floored = math.floor(scaled + float(slack(scaled)))
    text = f"{floored / scale:.{places}f}"
    return "0" if text.strip("-0.") == "" else text


def _significant(value: float, digits: int) -> str:
    if value == 0:
        return "0"
    places = max(0, digits - 1 - math.floor(math.log10(abs(value))))
    text = f"{round(value, places):.{places}f}"
    return "0" if text.strip("-0.") == "" else text
