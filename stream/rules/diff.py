"""What changed between two rule sets: rules added, removed, moved and re-decided.

Inside: :func:`diff_rules` (two lists of :class:`~stream.rules.Rule` -> :class:`RuleDiff`),
:func:`render_diff_text` (for people), :meth:`RuleDiff.to_dict` (for machines), and
:func:`load_side` and :func:`pick_pair` (rules from snapshot files, model files and
snapshot directories). Regions and their relations live in :mod:`stream.rules.regions`.

How rules are matched
---------------------
Rule ids are node numbers and say nothing across snapshots once parts of the tree are
regrown, so matching looks at the conditions only:

1. A rule's *region* is its conditions per feature: a numeric interval ``lo < x <= hi``,
   a category set (``in`` or ``not in``), and whether a missing value is admitted.
2. Identical regions match first.
3. A rule's *shape* is which features it tests and how (lower bound, upper bound,
   ``in``, ``not in``). Left-over rules of the same shape whose regions still overlap
   (on records with every value present) are paired, closest first; closeness sums
   each bound's move divided by the spread of that feature's thresholds in both sets
   (plus the Jaccard distance of category sets). A rule whose region was cut into
   pieces (every new rule meeting it lies inside it) is not paired with one of its
   pieces, nor a rule that absorbed several old ones with one of them.
   A threshold that moves a little therefore keeps its rule; a rule whose region no
   longer meets its old one is reported as removed and added.
4. Everything else is added or removed. Because the rules of one set partition the
   input space, an added rule names the old rules its region overlaps (a leaf that
   split shows as its children "carved from" the old rule; a regrown subtree as new
   rules that "take over from" several old ones) and a removed rule the new rules that
   cover it now (one new rule: it was "absorbed into" it).
"""

from __future__ import annotations

import dataclasses
from typing import Sequence

from .bulk import in_bulk
from .overlap import meeting_lists
from .regions import Span, region_of, shape_of, within
from .rule import Rule
from .text import MARKS_LEGEND, rule_conditions_text, uses_marks
from .thresholds import Thresholds


def _scales(*rule_sets: Sequence[Rule]) -> dict[str, float]:
    values: dict[str, list[float]] = {}
    for rules in rule_sets:
        for rule in rules:
            for c in rule.conditions:
                if c.op in ("<=", ">"):
                    values.setdefault(c.feature, []).append(float(c.value))
    scales = {}
    for feature, found in values.items():
        spread = max(found) - min(found)
        scales[feature] = spread if spread > 0 else max(abs(found[0]), 1.0)
    return scales


def _distance(a: dict[str, Span], b: dict[str, Span], scales: dict[str, float]) -> float:
    total = 0.0
    for feature, span in a.items():
        other = b[feature]
        if span.kind == "num":
            scale = scales.get(feature, 1.0)
            for x, y in ((span.lo, other.lo), (span.hi, other.hi)):
                if x is not None and y is not None:
                    total += abs(x - y) / scale
        else:
            union = span.labels | other.labels
            if union:
                total += len(span.labels ^ other.labels) / len(union)
        if span.missing != other.missing:
            total += 1e-6  # prefer the pairing that keeps missing-value handling
    return total


# --------------------------------------------------------------------------- the diff


@dataclasses.dataclass
class Change:
    """A rule present in both sets (matched by region), with what moved."""

    old: Rule
    new: Rule
    moves: list[dict]
    categories: list[dict]
    missing: list[dict]

    @property
    def predict_changed(self) -> bool:
        return self.old.predict != self.new.predict

    @property
    def conditions_changed(self) -> bool:
        return bool(self.moves or self.categories or self.missing)

    def to_dict(self) -> dict:
        return {
            "old": self.old.id, "new": self.new.id,
            "predict": {"old": self.old.predict, "new": self.new.predict}
            if self.predict_changed else None,
            "moves": self.moves, "categories": self.categories, "missing": self.missing,
            "confidence": _shift(self.old.confidence, self.new.confidence),
            "coverage": _shift(self.old.coverage, self.new.coverage),
            "records": _shift(self.old.records, self.new.records, 3),
            "conditions": [c.to_dict() for c in self.new.conditions],
        }


@dataclasses.dataclass
class RuleDiff:
    """Two rule sets compared. ``old_header`` / ``new_header`` describe each side."""

    old_header: dict
    new_header: dict
    added: list[tuple[Rule, list[str]]]      # rule, ids of old rules it overlaps
    removed: list[tuple[Rule, list[str]]]    # rule, ids of new rules that overlap it
    matched: list[Change]
    concern: str | None = None               # the class of concern, once led with

    def concern_first(self, concern: str | None) -> "RuleDiff":
        """The same diff with the entries touching the class of concern (a rule that
        predicts it, before or after) listed first in each list, order kept otherwise."""
        if concern is None:
            return self

        def first(pairs):
            return sorted(pairs, key=lambda p: p[0].predict != concern)

        return dataclasses.replace(
            self, added=first(self.added), removed=first(self.removed),
            matched=sorted(self.matched, key=lambda c: not touches(c, concern)),
            concern=concern)

    def concern_count(self) -> int:
        """Rules new, gone or changed that predict (or predicted) the class of concern."""
        if self.concern is None:
            return 0
        return (sum(r.predict == self.concern for r, _ in self.added + self.removed)
                + sum(touches(c, self.concern) for c in self.changed))

    @property
    def changed(self) -> list[Change]:
        """Matched rules whose conditions or outcome changed."""
        return [c for c in self.matched if c.conditions_changed or c.predict_changed]

    @property
    def unchanged(self) -> list[Change]:
        """Matched rules with the same conditions and outcome (evidence may differ)."""
        return [c for c in self.matched if not (c.conditions_changed or c.predict_changed)]

    def churn(self) -> dict:
        """Counts: added, removed, changed (conditions or outcome), unchanged."""
        return {"added": len(self.added), "removed": len(self.removed),
                "changed": len(self.changed), "unchanged": len(self.unchanged),
                "outcome_changed": sum(c.predict_changed for c in self.matched),
                "thresholds_moved": sum(len(c.moves) for c in self.matched)}

    def to_dict(self) -> dict:
        """JSON form: both sides, counts, and every rule added, removed or matched."""
        return {
            "format": "sapwood-rule-diff", "version": 1,
            "old": self.old_header, "new": self.new_header, "counts": self.churn(),
            "concern": self.concern, "concern_changes": self.concern_count(),
            "added": [{**rule.to_dict(), "overlaps_old": ids} for rule, ids in self.added],
            "removed": [{**rule.to_dict(), "covered_by_new": ids}
                        for rule, ids in self.removed],
            "matched": [c.to_dict() for c in self.matched],
        }


def touches(change: Change, concern: str) -> bool:
    """Whether a matched rule predicts the class of concern on either side."""
    return change.old.predict == concern or change.new.predict == concern


def _shift(old: float, new: float, digits: int = 6) -> dict:
    return {"old": round(float(old), digits), "new": round(float(new), digits),
            "by": round(float(new) - float(old), digits)}


@in_bulk
def diff_rules(old: Sequence[Rule], new: Sequence[Rule], old_header: dict | None = None,
               new_header: dict | None = None) -> RuleDiff:
    """Compare two rule sets (see the module notes for how rules are matched).

    Parameters
    ----------
    old, new
        The rules before and after, e.g. of two snapshots.
    old_header, new_header
        Facts shown for each side (target, sequence, records, written_at, ...).
    """
    old, new = list(old), list(new)
    regions_old = [region_of(r.conditions) for r in old]
    regions_new = [region_of(r.conditions) for r in new]
    pairs: dict[int, int] = {}

    # 1. identical regions
    by_region: dict[tuple, list[int]] = {}
    for j, region in enumerate(regions_new):
        by_region.setdefault(_region_key(region), []).append(j)
    for i, region in enumerate(regions_old):
        candidates = by_region.get(_region_key(region))
        if candidates:
            same_id = [j for j in candidates if new[j].id == old[i].id]
            j = same_id[0] if same_id else candidates[0]
            candidates.remove(j)
            pairs[i] = j

    # 2. same shape, overlapping, closest first -- except a rule that was split into
    #    pieces (every new rule meeting it lies inside it) or that absorbed several old
    #    rules: one piece keeping the old shape is a split, not a moved threshold.
    taken = set(pairs.values())
    # Records with every value present decide what was carved from what: where missing
    # values go follows the heavier branch and changes without any split.
    meets = meeting_lists(regions_old, regions_new)
    met_by: list[list[int]] = [[] for _ in new]
    for i, js in enumerate(meets):
        for j in js:
            met_by[j].append(i)
    split = {i for i, js in enumerate(meets) if i not in pairs and len(js) > 1
             and all(within(regions_new[j], regions_old[i], False) for j in js)}
    absorbed = {j for j, is_ in enumerate(met_by) if j not in taken and len(is_) > 1
                and all(within(regions_old[i], regions_new[j], False) for i in is_)}
    scales = _scales(old, new)
    shapes = {j: shape_of(region) for j, region in enumerate(regions_new)
              if j not in taken and j not in absorbed}
    candidates = []
    for i, region in enumerate(regions_old):
        if i in pairs or i in split:
            continue
        shape = shape_of(region)
        for j in meets[i]:
            if shapes.get(j) == shape:
                candidates.append((_distance(region, regions_new[j], scales),
                                   old[i].id != new[j].id, i, j))
    candidates.sort()
    for _, _, i, j in candidates:
        if i not in pairs and j not in taken:
            pairs[i] = j
            taken.add(j)

    matched = [_change(old[i], new[j], regions_old[i], regions_new[j])
               for i, j in sorted(pairs.items(), key=lambda p: p[1])]
    added = [(new[j], [old[i].id for i in met_by[j]])
             for j in range(len(new)) if j not in taken]
    removed = [(old[i], [new[j].id for j in meets[i]])
               for i in range(len(old)) if i not in pairs]
    return RuleDiff(dict(old_header or {}), dict(new_header or {}), added, removed, matched)


def _region_key(region: dict[str, Span]) -> tuple:
    return tuple(sorted((f, s.kind, s.lo, s.hi, s.op, tuple(sorted(s.labels)), s.missing)
                        for f, s in region.items()))


def _change(old: Rule, new: Rule, a: dict[str, Span], b: dict[str, Span]) -> Change:
    moves, categories, missing = [], [], []
    for feature in sorted(a, key=lambda f: _first_use(old, f)):
        x, y = a[feature], b[feature]
        if x.kind == "num":
            for bound, before, after in (("lower", x.lo, y.lo), ("upper", x.hi, y.hi)):
                if before is not None and after is not None and before != after:
                    moves.append({"feature": feature, "bound": bound, "old": before,
                                  "new": after, "by": after - before})
        elif x.labels != y.labels:
            categories.append({"feature": feature, "op": x.op,
                               "added": sorted(y.labels - x.labels),
                               "removed": sorted(x.labels - y.labels)})
        if x.missing != y.missing:
            missing.append({"feature": feature, "old": x.missing, "new": y.missing})
    return Change(old, new, moves, categories, missing)


def _first_use(rule: Rule, feature: str) -> int:
    return next(k for k, c in enumerate(rule.conditions) if c.feature == feature)


# --------------------------------------------------------------------------- text


def _pct(value: float) -> str:
    return f"{100 * value:.1f}%"


def _id_list(ids: Sequence[str], limit: int = 10) -> str:
    shown = ", ".join(ids[:limit])
    return shown if len(ids) <= limit else f"{shown} and {len(ids) - limit} more"


def origin_note(ids: Sequence[str]) -> str:
    """Where a new rule's records were before: one old rule means the new rule lies
    inside it (the rules of one tree partition the space), i.e. a piece of a split."""
    if not ids:
        return ""
    if len(ids) == 1:
        return f"carved from {ids[0]}"
    return f"takes over from {_id_list(ids)}"


def fate_note(ids: Sequence[str]) -> str:
    """Where a gone rule's records go now (one new rule: it lies inside that rule)."""
    if not ids:
        return ""
    if len(ids) == 1:
        return f"absorbed into {ids[0]}"
    return f"now covered by {_id_list(ids)}"


def _points(by: float) -> str:
    text = f"{100 * by:+.1f}"
    return ("0.0" if text in ("+0.0", "-0.0") else text) + " points"


def _side(header: dict) -> str:
    parts = []
    if header.get("sequence") is not None:
        parts.append(f"snapshot {header['sequence']}")
    elif header.get("source"):
        parts.append(str(header["source"]))
    facts = []
    if header.get("records") is not None:
        facts.append(f"{header['records']:,} records")
    if header.get("written_at"):
        facts.append(str(header["written_at"]))
    if facts:
        parts.append("(" + ", ".join(facts) + ")")
    return " ".join(parts) or "rules"


def _outcome(rule: Rule, target: str) -> str:
    return "no records yet" if rule.predict is None else f"{target} = {rule.predict}"


def render_diff_text(diff: RuleDiff, min_shift: float = 0.02, exact: bool = False) -> str:
    """The diff for people: counts, then each added, removed and changed rule.

    ``min_shift`` (a fraction) is the smallest confidence or coverage move listed for a
    rule whose conditions and outcome stayed the same; thresholds print in the data's
    resolution, or in full with ``exact`` (see :class:`Thresholds`).
    """
    style = Thresholds.of_both(diff.old_header, diff.new_header, exact)
    target = diff.new_header.get("target") or diff.old_header.get("target") or "target"
    counts = diff.churn()
    lines = [f"Rule changes for {target}",
             f"  before: {_side(diff.old_header)}, "
             f"{len(diff.matched) + len(diff.removed)} rules",
             f"  after:  {_side(diff.new_header)}, "
             f"{len(diff.matched) + len(diff.added)} rules",
             f"  {counts['added']} new, {counts['removed']} gone, {counts['changed']} changed "
             f"({counts['thresholds_moved']} thresholds moved, {counts['outcome_changed']} "
             f"outcomes changed), {counts['unchanged']} kept"]
    if diff.concern is not None:
        lines.append(f"  class of concern {diff.concern}: {diff.concern_count()} of these "
                     f"changes touch rules predicting it (listed first)")
    lines.append("")
    width = max([len(r.id) for r, _ in diff.added + diff.removed]
                + [len(_ids(c)) for c in diff.matched] + [2]) + 2
    pad = " " * width
    if diff.added:
        lines.append("New rules")
        for rule, ids in diff.added:
            lines.append(f"  {rule.id:<{width}}IF {rule_conditions_text(rule, style)}")
            lines.append(f"  {pad}THEN {_outcome(rule, target)}  (confidence "
                         f"{_pct(rule.confidence)}, coverage {_pct(rule.coverage)})")
            if ids:
                lines.append(f"  {pad}{origin_note(ids)}")
        lines.append("")
    if diff.removed:
        lines.append("Rules gone")
        for rule, ids in diff.removed:
            lines.append(f"  {rule.id:<{width}}IF {rule_conditions_text(rule, style)}")
            lines.append(f"  {pad}THEN {_outcome(rule, target)}  (was confidence "
                         f"{_pct(rule.confidence)}, coverage {_pct(rule.coverage)})")
            if ids:
                lines.append(f"  {pad}{fate_note(ids)}")
        lines.append("")
    if diff.changed:
        lines.append("Changed rules")
        for change in diff.changed:
            lines.extend(_change_lines(change, target, width, style))
        lines.append("")
    shifted = [c for c in diff.unchanged
               if abs(c.new.confidence - c.old.confidence) >= min_shift
               or abs(c.new.coverage - c.old.coverage) >= min_shift]
    if shifted:
        lines.append(f"Same conditions and outcome, evidence moved by "
                     f"{100 * min_shift:.1f} points or more")
        for change in shifted:
            lines.append(f"  {_ids(change):<{width}}{_evidence(change)}")
        lines.append("")
    lines.append(f"{len(diff.unchanged)} rules kept their conditions and outcome"
                 f"{f' ({len(shifted)} listed above)' if shifted else ''}.")
    if uses_marks([r for r, _ in diff.added + diff.removed] + [c.new for c in diff.changed]):
        lines.append(MARKS_LEGEND)
    return "\n".join(lines) + "\n"


def _ids(change: Change) -> str:
    if change.old.id == change.new.id:
        return change.new.id
    return f"{change.old.id}->{change.new.id}"


def _evidence(change: Change) -> str:
    old, new = change.old, change.new
    return (f"confidence {_pct(old.confidence)} -> {_pct(new.confidence)} "
            f"({_points(new.confidence - old.confidence)}), coverage {_pct(old.coverage)} "
            f"-> {_pct(new.coverage)} ({_points(new.coverage - old.coverage)})")


def _change_lines(change: Change, target: str, width: int, style: Thresholds) -> list[str]:
    pad = " " * width
    out = [f"  {_ids(change):<{width}}IF {rule_conditions_text(change.new, style)}"]
    if change.predict_changed:
        out.append(f"  {pad}THEN {target}: {change.old.predict} -> {change.new.predict}")
    for move in change.moves:
        out.append(f"  {pad}{move['feature']} {move['bound']} bound "
                   f"{style.move(move['feature'], move['old'], move['new'])}")
    for cat in change.categories:
        parts = []
        if cat["added"]:
            parts.append("now lists " + ", ".join(cat["added"]))
        if cat["removed"]:
            parts.append("no longer lists " + ", ".join(cat["removed"]))
        out.append(f"  {pad}{cat['feature']} ({cat['op']}): " + "; ".join(parts))
    for item in change.missing:
        out.append(f"  {pad}{item['feature']}: missing values "
                   f"{'now' if item['new'] else 'no longer'} follow this rule")
    out.append(f"  {pad}{_evidence(change)}")
    return out
