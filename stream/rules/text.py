"""Rules as aligned text for people: a pure function with fixed decimals and a stable order."""

from __future__ import annotations

from typing import Sequence

from stream.shown import printable
from stream.tree.paths import Condition

from .rule import Rule
from .thresholds import Thresholds, format_number

MISSING_MARK = "*"
"""Marks a condition that records missing the field also meet (they follow its branch)."""

NEW_VALUE_MARK = "+"
"""Marks a category condition that values unseen when the split was made also meet."""

MARKS_LEGEND = (f"{MISSING_MARK} also records where the field is missing;  "
                f"{NEW_VALUE_MARK} also values not seen when the split was made")
"""The legend line under a listing that uses the marks."""

CAUTION = ("Learned rules describe what the data showed so far. They are advisory, not safety "
           "interlocks: defer to site safety systems, local codes and licensed practice.")
"""The one-line caution that ends every view of rules meant for people."""

CAUTION_IN_FULL = (CAUTION + " Do not use them to override or bypass protective systems, "
                   "alarms of record or engineering judgement.")
"""The caution where there is room for it (the HTML report)."""


def drift_words(rule: Rule) -> str:
    """A rule's drift state in the words every view uses: ``""`` when stable, ``watching
    (alternate growing)`` while an alternate subtree grows on its path, ``replaced at
    record N`` when its part of the tree was swapped for an alternate."""
    state = getattr(rule, "drift", "stable")
    if state == "watching":
        return "watching (alternate growing)"
    if state == "replaced":
        at = getattr(rule, "replaced_at", None)
        return f"replaced at record {_count(at)}" if isinstance(at, int) else "replaced"
    return ""


def rule_conditions_text(rule: Rule, style: Thresholds | None = None) -> str:
    """A rule's conditions on one line: ``door = open AND ambient_c > 27.9``; ``always``
    when there are none."""
    return conditions_text(rule.conditions, style) if rule.conditions else "always"


def conditions_text(conditions: Sequence[Condition], style: Thresholds | None = None) -> str:
    """Conditions on one line, ``AND``-joined; ``(everything)`` when there are none."""
    if not conditions:
        return "(everything)"
    return " AND ".join(format_condition(group, style) for group in _grouped(conditions))


def uses_marks(rules: Sequence[Rule]) -> bool:
    """Whether the text of ``rules`` carries a missing-value or new-value mark (so a
    listing needs :data:`MARKS_LEGEND`)."""
    return any(c.missing or (c.op in ("in", "not in") and c.branch)
               for r in rules for c in r.conditions)


def format_condition(conditions: Sequence[Condition], style: Thresholds | None = None) -> str:
    """One feature's merged conditions as text: ``12.5 < supply_temp <= 30.1``; a mark
    follows when records missing the field (``*``) or category values unseen at the split
    (``+``) also meet it. ``style`` prints thresholds in the data's resolution."""
    feature = conditions[0].feature
    name = printable(feature)

    def number(value: float) -> str:
        return style.number(feature, value) if style is not None else format_number(value)

    lo = next((c.value for c in conditions if c.op == ">"), None)
    hi = next((c.value for c in conditions if c.op == "<="), None)
    sets = [c for c in conditions if c.op in ("in", "not in")]
    if sets and sets[0].branch:
        c = sets[0]
        branch = [printable(label) for label in c.branch]
        shown = branch[0] if len(branch) == 1 else "{" + ", ".join(branch) + "}"
        text = f"{name} {'=' if len(c.branch) == 1 else 'in'} {shown}"
        return text + " " + (MISSING_MARK if c.missing else "") + NEW_VALUE_MARK
    if sets:
        c = sets[0]
        labels = ", ".join(printable(label) for label in c.value)
        text = f"{name} {'=' if c.op == 'in' and len(c.value) == 1 else c.op} "
        text += labels if c.op == "in" and len(c.value) == 1 else "{" + labels + "}"
    elif lo is not None and hi is not None:
        text = f"{number(lo)} < {name} <= {number(hi)}"
    elif lo is not None:
        text = f"{name} > {number(lo)}"
    else:
        text = f"{name} <= {number(hi)}"
    if conditions[0].missing:
        text += f" {MISSING_MARK}"
    return text


def _grouped(conditions: Sequence[Condition]) -> list[list[Condition]]:
    groups: dict[str, list[Condition]] = {}
    for c in conditions:
        groups.setdefault(c.feature, []).append(c)
    return list(groups.values())


def _count(value: float) -> str:
    return f"{value:,.0f}"


def render_text(rules: Sequence[Rule], header: dict) -> str:
    """Rules as aligned text, in the order given. ``header`` needs ``target``;
    ``records``, ``accuracy``, ``concern`` and ``written_at`` are shown when present
    (``concern_records``: the class of concern's records in the whole tree, when only
    some rules are shown; ``decimals`` per field and ``exact``: how thresholds print, see
    :class:`Thresholds`)."""
    style = Thresholds.of(header, bool(header.get("exact")))
    target = printable(str(header.get("target", "target")))
    lines = [f"sapwood rules for {target}"]
    concern = header.get("concern")
    classes = concern is not None and not any(r.estimate is not None for r in rules)
    held = sum(r.class_counts.get(concern, 0.0) for r in rules) if classes else 0.0
    held = header.get("concern_records") or held
    facts = []
    if header.get("records") is not None:
        facts.append(f"{_count(header['records'])} records learned")
    if header.get("shown") is not None and classes:
        facts.append(f"{len(rules)} rules shown (the class of concern's first, then those "
                     f"covering the most records)")
    elif header.get("shown") is not None and concern is not None:
        facts.append(f"{len(rules)} rules shown (those predicting the "
                     f"{'highest' if concern == 'high' else 'lowest'} values)")
    elif header.get("shown") is not None:
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
    if classes:
        lines.append(f"class of concern: {target} = {printable(str(concern))} (the rules "
                     f"predicting it come first, those catching most of it first)")
    elif concern is not None:
        lines.append(f"rules predicting the {'highest' if concern == 'high' else 'lowest'} "
                     f"{target} first")
    lines.append("")
    width = max((len(r.id) for r in rules), default=2) + 2
    pad = " " * width
    for r in rules:
        groups = _grouped(r.conditions)
        if not groups:
            lines.append(f"{r.id:<{width}}ALWAYS")
        for i, group in enumerate(groups):
            lead = f"{r.id:<{width}}IF   " if i == 0 else f"{pad}AND  "
            lines.append(lead + format_condition(group, style))
        extra = []
        if r.estimate is not None:
            lines.append(f"{pad}THEN {target} = {r.estimate.get('shown', '?')}")
            detail = f"coverage {100 * r.coverage:.1f}%, {_count(r.records)} records"
            if r.estimate.get("mae") is not None:
                extra.append(f"mean absolute error {format_number(r.estimate['mae'])} over "
                             f"{_count(r.scored)} scored")
        else:
            outcome = ("(no records yet)" if r.predict is None
                       else f"{target} = {printable(str(r.predict))}")
            lines.append(f"{pad}THEN {outcome}")
            detail = (f"confidence {100 * r.confidence:.1f}%, coverage "
                      f"{100 * r.coverage:.1f}%, {_count(r.records)} records")
            split = " / ".join(f"{printable(str(label))} {_count(v)}"
                               for label, v in r.class_counts.items()
                               if v >= 0.5)
            if split:
                detail += f" ({split})"
            if classes and r.predict == concern and held > 0:
                extra.append(f"catches {100 * r.class_counts.get(concern, 0.0) / held:.1f}% "
                             f"of the {printable(str(concern))} records")
            if r.accuracy is not None:
                extra.append(f"scored right {100 * r.accuracy:.1f}% of {_count(r.scored)}")
        lines.append(f"{pad}     {detail}")
        if r.leaf_model == "naive_bayes" and r.estimate is None:
            extra.append("naive Bayes refines within the rule")
        if not r.active:
            extra.append("not growing")
        if drift_words(r):
            extra.append(f"drift: {drift_words(r)}")
        if extra:
            lines.append(f"{pad}     " + "; ".join(extra))
        lines.append("")
    if uses_marks(rules):
        lines += [MARKS_LEGEND, ""]
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"
