"""Rules and rule changes as Markdown, for tickets, shift notes and reports.

Inside: :func:`rules_markdown` (a table of rules under a heading with the headline
facts), :func:`diff_markdown` (what changed since an earlier snapshot, as lists) and
:func:`shift_note` (both, plus the safety note). Pure functions: the same input gives
the same text. Values from the data (field names, labels, category values) never
reach the Markdown raw: they are set in code spans (:func:`_data`, where HTML, links
and emphasis are not read) after their control characters and line breaks are escaped
(a line break would end the span and let the next line start a heading); in running
text (:func:`_text`) the punctuation that starts markup is backslash-escaped, which
CommonMark 0.31 section 2.4 allows for any ASCII punctuation. Table cells escape ``|``
(GitHub-flavoured Markdown tables).
"""

from __future__ import annotations

import re
from typing import Sequence

from stream.shown import printable
from stream.tree.paths import Condition

from .diff import RuleDiff, fate_note, origin_note
from .rule import Rule
from .simplify import Simplified
from .text import CAUTION, MARKS_LEGEND, format_condition, rule_conditions_text, uses_marks
from .thresholds import Thresholds



# the punctuation that starts markup anywhere in a line (emphasis, code, links, images,
# HTML, entities, headings, tables, strikethrough); a backslash before any ASCII
# punctuation is allowed (CommonMark 0.31, section 2.4)
_PUNCTUATION = re.compile(r"([\\`*_\[\]<>#|~&!])")


def _text(value: object) -> str:
    """A value from the data in running text: printable, every punctuation escaped."""
    return _PUNCTUATION.sub(r"\\\1", printable(str(value)))


def _data(value: object) -> str:
    """A value from the data as a code span that the value cannot break out of."""
    return _code(printable(str(value)))


def _cell(text: str) -> str:
    return text.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ")


def _code(text: str) -> str:
    # CommonMark: a code span's fence must be longer than any backtick run inside it
    longest = max((len(run) for run in re.findall(r"`+", text)), default=0)
    fence = "`" * (longest + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def _when(rule: Rule, style: Thresholds) -> str:
    groups: dict[str, list[Condition]] = {}
    for c in rule.conditions:
        groups.setdefault(c.feature, []).append(c)
    if not groups:
        return "always"
    return " and ".join(_code(format_condition(g, style)) for g in groups.values())


def _pct(value: float | None) -> str:
    return "n/a" if value is None else f"{100 * value:.1f}%"


def _facts(header: dict, shown: int, total: int | None) -> str:
    facts = []
    if header.get("records") is not None:
        facts.append(f"{header['records']:,} records learned")
    if header.get("accuracy") is not None:
        facts.append(f"prequential accuracy {_pct(header['accuracy'])}")
    if total is not None and total != shown:
        facts.append(f"{shown} of {total} rules shown")
    else:
        facts.append(f"{shown} rule{'' if shown == 1 else 's'}")
    if header.get("concern") is not None:
        facts.append(f"class of concern {_text(header['concern'])}, its rules first")
    if header.get("written_at"):
        facts.append(f"snapshot written {_text(header['written_at'])}")
    elif header.get("data_time"):
        facts.append(f"data up to {_text(header['data_time'])}")
    return " · ".join(facts)


def rules_markdown(rules: Sequence[Rule | Simplified], header: dict,
                   title: str | None = None, total: int | None = None) -> str:
    """A heading, the headline facts and one table row per rule.

    Parameters
    ----------
    rules
        Rules in display order, or simplified rules (their sources are listed below
        the table).
    header
        ``target`` (required), and ``records``, ``accuracy``, ``sequence``,
        ``written_at``, ``concern`` (with ``concern_records``, its records in the whole
        tree, for the share each of its rules catches) when known.
    title
        Heading text; by default "Rules for <target>".
    total
        How many rules there are in all, when ``rules`` is a selection.
    """
    target = header.get("target", "target")
    heading = title or f"Rules for {_text(target)}"
    if header.get("sequence") is not None and title is None:
        heading += f" (snapshot {header['sequence']})"
    style = Thresholds.of(header, bool(header.get("exact")))
    lines = [f"## {heading}", "", _facts(header, len(rules), total), ""]
    if not rules:
        lines += ["No rules to show.", ""]
        return "\n".join(lines)
    concern = header.get("concern")
    held = header.get("concern_records") or 0.0
    catch = concern is not None and held > 0
    lines += [f"| Rule | When | Then {_text(target)} is | Confidence | Coverage | Records |"
              + (f" Catches of {_text(concern)} |" if catch else ""),
              "|---|---|---|---:|---:|---:|" + ("---:|" if catch else "")]
    joined = []
    for item in rules:
        rule = item.rule if isinstance(item, Simplified) else item
        if isinstance(item, Simplified) and len(item.sources) > 1:
            joined.append(f"{rule.id} joins {', '.join(item.sources)}")
        outcome = "(no records yet)" if rule.predict is None else _data(rule.predict)
        row = (f"| {rule.id} | {_cell(_when(rule, style))} | {_cell(outcome)} | "
               f"{_pct(rule.confidence)} | {_pct(rule.coverage)} | {rule.records:,.0f} |")
        if catch:
            row += (f" {_pct(rule.class_counts.get(concern, 0.0) / held)} |"
                    if rule.predict == concern else " |")
        lines.append(row)
    lines.append("")
    if uses_marks([item.rule if isinstance(item, Simplified) else item for item in rules]):
        lines += [_text(MARKS_LEGEND), ""]
    if joined:
        lines.append("Rules that decide alike and differ in one condition are joined; "
                     "each joined rule lists the tree's rules it stands for:")
        lines.append("")
        lines += [f"- {entry}" for entry in joined]
        lines.append("")
    return "\n".join(lines)


def _rule_line(rule: Rule, target: str, style: Thresholds) -> str:
    outcome = "no records yet" if rule.predict is None else f"{target} = {rule.predict}"
    outcome = printable(outcome)
    return (f"**{rule.id}** {_code('IF ' + rule_conditions_text(rule, style))} "
            f"then {_code(outcome)} (confidence {_pct(rule.confidence)}, coverage "
            f"{_pct(rule.coverage)})")


def diff_markdown(diff: RuleDiff, limit: int = 20, exact: bool = False) -> str:
    """What changed between the two sides of ``diff``, as Markdown lists.

    At most ``limit`` entries per list; the rest are counted. Thresholds print in the
    data's resolution, or in full with ``exact``.
    """
    style = Thresholds.of_both(diff.old_header, diff.new_header, exact)
    target = diff.new_header.get("target") or diff.old_header.get("target") or "target"
    counts = diff.churn()
    before = diff.old_header.get("sequence")
    title = f"Changes since snapshot {before}" if before is not None else "Changes"
    lines = [f"### {title}", "",
             f"{counts['added']} new, {counts['removed']} gone, {counts['changed']} changed "
             f"({counts['thresholds_moved']} thresholds moved, {counts['outcome_changed']} "
             f"outcomes changed), {counts['unchanged']} kept.", ""]
    if diff.concern is not None:
        lines += [f"Class of concern {_text(diff.concern)}: {diff.concern_count()} of these "
                  f"changes touch rules predicting it; they are listed first.", ""]

    def section(name: str, items: list[str]) -> None:
        if not items:
            return
        lines.append(f"**{name}**")
        lines.append("")
        lines.extend(f"- {item}" for item in items[:limit])
        if len(items) > limit:
            lines.append(f"- ... and {len(items) - limit} more")
        lines.append("")

    section("New rules", [_rule_line(rule, target, style)
                          + (f"; {origin_note(ids)}" if ids else "")
                          for rule, ids in diff.added])
    section("Rules gone", [_rule_line(rule, target, style)
                           + (f"; {fate_note(ids)}" if ids else "")
                           for rule, ids in diff.removed])
    changed = []
    for change in diff.changed:
        parts = []
        if change.predict_changed:
            parts.append(f"outcome {_data(change.old.predict)} -> "
                         f"{_data(change.new.predict)}")
        for move in change.moves:
            parts.append(f"{_data(move['feature'])} {move['bound']} bound "
                         f"{style.move(move['feature'], move['old'], move['new'])}")
        for cat in change.categories:
            if cat["added"]:
                parts.append(f"{_data(cat['feature'])} now lists "
                             f"{', '.join(map(_data, cat['added']))}")
            if cat["removed"]:
                parts.append(f"{_data(cat['feature'])} no longer lists "
                             f"{', '.join(map(_data, cat['removed']))}")
        for item in change.missing:
            parts.append(f"missing {_data(item['feature'])} "
                         f"{'now' if item['new'] else 'no longer'} follows this rule")
        label = change.new.id if change.old.id == change.new.id else \
            f"{change.old.id} (now {change.new.id})"
        changed.append(f"**{label}**: " + "; ".join(parts))
    section("Changed rules", changed)
    if uses_marks([r for r, _ in diff.added + diff.removed] + [c.new for c in diff.changed]):
        lines += [_text(MARKS_LEGEND), ""]
    return "\n".join(lines)


def shift_note(rules: Sequence[Rule | Simplified], header: dict,
               diff: RuleDiff | None = None, total: int | None = None,
               title: str | None = None) -> str:
    """A whole note: the rules table, the changes (if a diff is given), the safety note
    (``header["exact"]``: thresholds in full)."""
    parts = [rules_markdown(rules, header, title=title, total=total)]
    if diff is not None:
        parts.append(diff_markdown(diff, exact=bool(header.get("exact"))))
    parts.append(f"> {CAUTION}\n")
    return "\n".join(parts)
