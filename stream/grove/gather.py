"""The rules of every key of a grove in one place: a listing (text or JSON) and one HTML
page, both filterable by key. Read from the shared folder only; Ray is not asked."""

from __future__ import annotations

import fnmatch
import html
import json
import os
from dataclasses import dataclass
from typing import Iterator, Sequence

from stream.rules.concern import concern_of, concern_order
from stream.rules.rule import Rule, rules_payload
from stream.rules.text import CAUTION_IN_FULL, render_text
from stream.run.snapshots import SnapshotStore
from stream.views.keys import INDEX_NAME
from stream.views.rule_sources import load_rules

from .plan import GrovePlan


@dataclass
class KeyRules:
    """One key's newest rules, with where they came from and the key's figures."""

    key: str
    learner: str
    stream: str
    figures: dict
    header: dict
    rules: list[Rule]


def grove_keys(home: str, plan: GrovePlan, patterns: Sequence[str] = (),
               unsnapped: list[str] | None = None) -> Iterator[KeyRules]:
    """Every key of every learner (those matching one of ``patterns``, shell-style, when
    given), in learner then index order. Keys without a snapshot yet (a run writes one
    every ``--snapshot-every`` records of the key and at its end, not when stopped) are
    left out and appended to ``unsnapped``."""
    for learner in plan.learners:
        rules_dir = os.path.join(home, learner.folder, "rules")
        try:
            with open(os.path.join(rules_dir, INDEX_NAME), encoding="utf-8") as handle:
                entries = json.load(handle)["keys"]
        except (OSError, ValueError, KeyError):
            continue
        for entry in entries:
            key = entry["key"]
            if patterns and not any(fnmatch.fnmatchcase(key, p) for p in patterns):
                continue
            folder = os.path.join(rules_dir, entry["folder"])
            if not (os.path.isdir(folder) and SnapshotStore(folder).entries()):
                if unsnapped is not None:
                    unsnapped.append(key)
                continue
            header, rules = load_rules(folder)
            concern = concern_of(header, rules, None)
            yield KeyRules(key, learner.name, learner.stream, entry,
                           {**header, "concern": concern}, concern_order(rules, concern))


def listing_text(found: Sequence[KeyRules]) -> str:
    """The rules of each key under a line naming the key, its learner and stream."""
    parts = []
    for item in found:
        parts.append(f"=== key {item.key} (learner {item.learner}, stream {item.stream}) "
                     f"===\n")
        parts.append(render_text(item.rules, item.header))
        parts.append("\n")
    return "".join(parts)


def listing_json(found: Sequence[KeyRules]) -> list[dict]:
    """The listing as JSON-ready objects: key, learner, stream and the rules payload."""
    return [{"key": i.key, "learner": i.learner, "stream": i.stream,
             **rules_payload(i.rules, i.header)} for i in found]


_FIGURES = (("records", "records", "{:,.0f}"), ("accuracy", "accuracy", "{:.1%}"),
            ("concern_recall", "recall of the class of concern", "{:.1%}"),
            ("leaves", "rules", "{:,.0f}"), ("swaps", "confirmed changes", "{:,.0f}"),
            ("drift_alarms", "drift alarms", "{:,.0f}"))


def _figure(entry: dict, name: str, form: str) -> str:
    value = entry.get(name)
    return "" if value is None else form.format(value)


def report_html(plan: GrovePlan, found: Sequence[KeyRules], generated_at: str) -> str:
    """One self-contained page: a table of the keys with their figures, then each key's
    rules (pure: the same inputs give the same bytes)."""
    e = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>sapwood grove {e(plan.name)}: {e(plan.target)} by {e(plan.by)}</title>",
           "<style>body{font:14px/1.4 system-ui,sans-serif;margin:2em;max-width:70em}"
           "table{border-collapse:collapse}td,th{padding:2px 10px;text-align:right;"
           "border-bottom:1px solid #ddd}td:first-child,th:first-child{text-align:left}"
           "pre{background:#f6f6f2;padding:1em;overflow-x:auto}"
           ".caution{border-left:4px solid #c80;padding-left:1em}</style></head><body>",
           f"<h1>Grove {e(plan.name)}: {e(plan.target)}, one tree per {e(plan.by)}</h1>",
           f"<p>{len(found):,} keys from {len(plan.learners):,} learners; generated "
           f"{e(generated_at)}.</p>",
           f'<p class="caution">{e(CAUTION_IN_FULL)}</p>',
           "<table><tr><th>key</th><th>stream</th>"
           + "".join(f"<th>{e(label)}</th>" for _, label, _ in _FIGURES) + "</tr>"]
    for item in found:
        out.append(f'<tr><td><a href="#key-{e(item.key)}">{e(item.key)}</a></td>'
                   f"<td>{e(item.stream)}</td>"
                   + "".join(f"<td>{_figure(item.figures, name, form)}</td>"
                             for name, _, form in _FIGURES) + "</tr>")
    out.append("</table>")
    for item in found:
        out.append(f'<h2 id="key-{e(item.key)}">{e(plan.by)} = {e(item.key)}</h2>')
        out.append(f"<pre>{e(render_text(item.rules, item.header))}</pre>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"
