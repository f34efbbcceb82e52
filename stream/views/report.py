"""One self-contained HTML page about a run: metrics over time, drift, tree size, rule churn,
the current rules and what changed.

Inside: :class:`ReportData` (everything the page shows, read by :func:`load_report_data`
from a snapshot directory, a metrics log and an optional drift events file),
:func:`churn_table` (rules added, removed and changed per snapshot),
:func:`render_report` (data -> HTML text; pure) and :func:`write_report`.

The page fetches nothing: styles are inline, charts are inline SVG
(:mod:`stream.views.svg_plot`), there is no script, and a Content-Security-Policy meta tag
forbids every fetch, so a browser reports any reference that would leave the file. The
data behind the charts are embedded as JSON (``<script type="application/json"
id="report-data">``, which browsers do not run), so a reader can check each plotted
point against the metrics log.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from html import escape
from typing import Sequence

from stream.errors import InputError
from stream.rules.concern import catches, concern_of, concern_order, leads, top_rules
from stream.rules.diff import RuleDiff, diff_rules, fate_note, origin_note
from stream.rules.rule import Rule, rules_from_payload
from stream.rules.simplify import simplify
from stream.rules.text import CAUTION_IN_FULL, MARKS_LEGEND, drift_words, rule_conditions_text, \
    uses_marks
from stream.rules.thresholds import Thresholds
from stream.run.atomic import write_atomic
from stream.run.snapshots import SnapshotStore

from .rule_sources import header_of, read_snapshot
from .run_logs import event_path_text, read_events, read_metrics
from .svg_plot import PALETTE, Marker, Series, bar_chart, line_chart

CHURN_COLORS = {"new": "#2a8a4a", "gone": "#b8323a", "changed": "#d9731a"}
MAX_CHURN_SNAPSHOTS = 200
MAX_TABLE_RULES = 1000


@dataclasses.dataclass
class ReportData:
    """What the report shows. ``snapshots`` are the documents as written, oldest first."""

    snapshots: list[dict]
    metrics: list[dict]
    events: list[dict]
    sources: dict[str, str]
    sampled: bool = False


def load_report_data(snapshot_dir: str, metrics_path: str | None = None,
                     events_path: str | None = None,
                     max_snapshots: int = MAX_CHURN_SNAPSHOTS) -> ReportData:
    """Read a run's outputs for :func:`render_report`.

    More than ``max_snapshots`` snapshots are sampled evenly (first and last kept); the
    rule churn is then counted between the sampled snapshots, and the page says so.
    """
    store = SnapshotStore(snapshot_dir)
    entries = store.entries()
    if not entries:
        raise InputError(f"{snapshot_dir!r} holds no snapshots")
    sampled = len(entries) > max_snapshots
    if sampled:
        step = (len(entries) - 1) / (max_snapshots - 1)
        entries = [entries[round(k * step)] for k in range(max_snapshots)]
    snapshots = [read_snapshot(store, e["sequence"]) for e in entries]
    if metrics_path and not os.path.exists(metrics_path):
        raise InputError(f"cannot read {metrics_path!r}: no such file")
    metrics = read_metrics(metrics_path) if metrics_path else []
    events = read_events(events_path)
    sources = {"snapshots": snapshot_dir}
    if metrics_path:
        sources["metrics log"] = metrics_path
    if events_path:
        sources["drift events"] = events_path
    return ReportData(snapshots, metrics, events, sources, sampled)


def churn_table(snapshots: Sequence[dict], kept: dict | None = None) -> list[dict]:
    """Per snapshot after the first: sequence, records, and the counts of
    :meth:`stream.rules.diff.RuleDiff.churn` against the snapshot before it.

    ``kept`` (if given) receives the rules of the first and last snapshots and the last
    diff (``first``, ``last``, ``last_diff``), so a report reads and compares each
    snapshot once."""
    rows = []
    previous = None
    diff = None
    for k, document in enumerate(snapshots):
        rules = rules_from_payload(document)
        if previous is not None:
            diff = diff_rules(previous, rules)
            rows.append({"sequence": document["sequence"], "records": document["records"],
                         **diff.churn()})
        elif kept is not None:
            kept["first"] = rules
        previous = rules
    if kept is not None:
        kept["last"], kept["last_diff"] = previous, diff
    return rows


# --------------------------------------------------------------------------- the page

_CSS = """
body{font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1d2428;
background:#f6f7f8;margin:0}
main{max-width:1100px;margin:0 auto;padding:24px 28px 48px}
h1{font-size:1.6em;margin:0 0 4px}h2{font-size:1.2em;margin:32px 0 8px;
border-bottom:1px solid #d5dade;padding-bottom:4px}
.meta{color:#5c6b73;font-size:.9em}
.safety{background:#fff6e5;border-left:5px solid #d9731a;padding:10px 14px;margin:16px 0}
.cards{display:flex;flex-wrap:wrap;gap:10px;margin:14px 0}
.card{background:#fff;border:1px solid #d5dade;border-radius:6px;padding:8px 14px;
min-width:120px}.card b{display:block;font-size:1.35em}.card span{color:#5c6b73;font-size:.85em}
figure{background:#fff;border:1px solid #d5dade;border-radius:6px;margin:10px 0;padding:8px}
figcaption{color:#5c6b73;font-size:.88em;margin:4px 6px}
svg.chart{width:100%;height:auto;display:block}
svg .tick{font-size:11px;fill:#5c6b73}svg .axis{font-size:12px;fill:#1d2428}
svg .legend{font-size:12px;fill:#1d2428}
table{border-collapse:collapse;width:100%;background:#fff;font-size:.9em}
th,td{border:1px solid #d5dade;padding:4px 7px;text-align:left;vertical-align:top}
th{background:#eef1f3}td.n{text-align:right;white-space:nowrap}
code{font-family:ui-monospace,"SFMono-Regular",Menlo,Consolas,monospace;font-size:.92em}
details{margin:10px 0}summary{cursor:pointer;color:#1f5f99}
ul.changes li{margin:3px 0}
tr.concern td:first-child{border-left:4px solid #d9731a}
"""

_METRIC_LINES = (
    ("accuracy", "accuracy", "cumulative accuracy", ""),
    ("accuracy", "window_accuracy", "accuracy, last window", "5 3"),
    ("accuracy", "fading_accuracy", "fading accuracy", "1 2"),
    ("kappa", "kappa", "kappa", ""),
    ("kappa", "window_kappa", "kappa, last window", "5 3"),
    ("kappa", "kappa_m", "kappa-M", "1 2"),
    ("concern", "concern_recall", "recall (share of the class caught)", ""),
    ("concern", "concern_precision", "precision (share of its predictions right)", "5 3"),
    ("concern", "window_concern_recall", "recall, last window", "1 2"),
)


def _pct(value) -> str:
    return "n/a" if value is None else f"{100 * value:.1f}%"


def _markers(events: Sequence[dict]) -> list[Marker]:
    return [Marker(float(e["record"]), str(e["kind"]),
                   f"record {e['record']:,}: {e['kind']} at node {e.get('node', '?')}"
                   f"{' (' + str(e['time']) + ')' if e.get('time') else ''}: "
                   f"{event_path_text(e.get('path'))}")
            for e in events]


def _finite(value):
    """A plottable number, or None (absent, NaN or infinite)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return value if math.isfinite(value) else None


def _metric_series(rows: Sequence[dict], chart: str) -> list[Series]:
    xs = [float(r["records"]) for r in rows]
    out = []
    for k, (group, key, name, dash) in enumerate(_METRIC_LINES):
        if group != chart or not any(r.get(key) is not None for r in rows):
            continue
        out.append(Series(name, xs, [_finite(r.get(key)) for r in rows], PALETTE[k % 3],
                          dash))
    return out


def _snapshot_rows(snapshots: Sequence[dict]) -> list[dict]:
    """Metrics at each snapshot, for when there is no metrics log."""
    rows = []
    for d in snapshots:
        row = {"records": d["records"], **(d.get("metrics") or {})}
        tree = d.get("tree") or {}
        row["leaves"] = tree.get("leaves", len(d.get("rules", [])))
        row["depth"] = tree.get("depth")
        rows.append(row)
    return rows


def _cards(last: dict, snapshot: dict, events: Sequence[dict]) -> str:
    tree = snapshot.get("tree") or {}
    items = [(f"{last.get('records', snapshot.get('records', 0)):,}", "records learned"),
             (_pct(last.get("accuracy")), "prequential accuracy"),
             (_pct(last.get("window_accuracy")), "accuracy, last window"),
             ("n/a" if last.get("kappa") is None else f"{last['kappa']:.3f}", "kappa"),
             (str(len(snapshot.get("rules", []))), "rules now"),
             (str(tree.get("depth", last.get("depth", "n/a"))), "tree depth"),
             (str(sum(e.get("kind") == "swap" for e in events)), "confirmed changes (swaps)"),
             (str(sum(e.get("kind") == "alarm" for e in events)), "unconfirmed alarms")]
    return '<div class="cards">' + "".join(
        f'<div class="card"><b>{escape(v)}</b><span>{escape(k)}</span></div>'
        for v, k in items) + "</div>"


def _drift_text(rule: Rule) -> str:
    return drift_words(rule)


def _rules_table(rules: Sequence[Rule], target: str, sources: dict | None = None,
                 concern: str | None = None, style: Thresholds | None = None) -> str:
    note = ""
    share = catches(rules, concern)
    rules = concern_order(rules, concern)
    if len(rules) > MAX_TABLE_RULES:
        shown = top_rules(rules, concern, MAX_TABLE_RULES)
        which = ("those predicting the class of concern, then those covering the most "
                 "records" if share else "those covering the most records")
        note = (f"<p class=meta>{MAX_TABLE_RULES} rules of {len(rules)}: {which}; "
                f"<code>sapwood rules</code> lists them all.</p>")
        rules = shown
    # drift state per rule, when the rules carry one (stable / watching / replaced)
    drift = any(getattr(r, "drift", "stable") != "stable" for r in rules)
    head = ("<tr><th>rule</th><th>when</th><th>then " + escape(target) + "</th>"
            "<th>confidence</th><th>coverage</th><th>records</th><th>scored right</th>"
            + (f"<th>catches of {escape(str(concern))}</th>" if share else "")
            + ("<th>drift</th>" if drift else "")
            + ("<th>stands for</th>" if sources else "") + "</tr>")
    body = []
    for r in rules:
        accuracy = "" if r.accuracy is None else _pct(r.accuracy)
        outcome = "(no records yet)" if r.predict is None else r.predict
        extra = ""
        if share:
            extra += (f"<td class=n>{_pct(share.get(r.id, 0.0))}</td>" if leads(r, concern)
                      else "<td></td>")
        extra += f"<td>{escape(_drift_text(r))}</td>" if drift else ""
        extra += f"<td>{escape(', '.join(sources[r.id]))}</td>" if sources else ""
        lead = ' class="concern"' if leads(r, concern) else ""
        body.append(f"<tr{lead}><td><code>{escape(r.id)}</code></td>"
                    f"<td><code>{escape(rule_conditions_text(r, style))}</code></td>"
                    f"<td>{escape(outcome)}</td><td class=n>{_pct(r.confidence)}</td>"
                    f"<td class=n>{_pct(r.coverage)}</td><td class=n>{r.records:,.0f}</td>"
                    f"<td class=n>{accuracy}</td>{extra}</tr>")
    legend = f"<p class=meta>{escape(MARKS_LEGEND)}</p>" if uses_marks(rules) else ""
    return f'{note}<table class="rules">{head}{"".join(body)}</table>{legend}'


def _diff_html(diff: RuleDiff, target: str, style: Thresholds, limit: int = 40) -> str:
    counts = diff.churn()
    old, new = diff.old_header, diff.new_header
    parts = [f"<p>From snapshot {old.get('sequence')} ({old.get('records', 0):,} records, "
             f"{old.get('rule_count', 0)} rules) to snapshot {new.get('sequence')} "
             f"({new.get('records', 0):,} records, {new.get('rule_count', 0)} rules): "
             f"<b>{counts['added']}</b> new, <b>{counts['removed']}</b> gone, "
             f"<b>{counts['changed']}</b> changed ({counts['thresholds_moved']} thresholds "
             f"moved, {counts['outcome_changed']} outcomes changed), "
             f"<b>{counts['unchanged']}</b> kept.</p>"]
    if diff.concern is not None:
        parts.append(f"<p>{diff.concern_count()} of these changes touch rules predicting the "
                     f"class of concern ({escape(str(diff.concern))}); they are listed "
                     "first.</p>")

    def rule_item(rule: Rule, note: str) -> str:
        outcome = "no records yet" if rule.predict is None else f"{target} = {rule.predict}"
        return (f"<li><code>{escape(rule.id)}</code> IF <code>"
                f"{escape(rule_conditions_text(rule, style))}</code> THEN "
                f"<code>{escape(outcome)}</code> (confidence {_pct(rule.confidence)}, "
                f"coverage {_pct(rule.coverage)}){escape(note)}</li>")

    def section(title: str, items: list[str]) -> None:
        if not items:
            return
        more = f"<li>... and {len(items) - limit} more</li>" if len(items) > limit else ""
        parts.append(f"<h3>{escape(title)}</h3><ul class=changes>"
                     f"{''.join(items[:limit])}{more}</ul>")

    section("New rules", [rule_item(r, f"; {origin_note(ids)}" if ids else "")
                          for r, ids in diff.added])
    section("Rules gone", [rule_item(r, f"; {fate_note(ids)}" if ids else "")
                           for r, ids in diff.removed])
    changed = []
    for c in diff.changed:
        notes = []
        if c.predict_changed:
            notes.append(f"outcome {c.old.predict} -> {c.new.predict}")
        notes += [f"{m['feature']} {m['bound']} bound "
                  f"{style.move(m['feature'], m['old'], m['new'])}" for m in c.moves]
        notes += [f"{k['feature']} now lists {', '.join(k['added'])}" for k in c.categories
                  if k["added"]]
        notes += [f"{k['feature']} no longer lists {', '.join(k['removed'])}"
                  for k in c.categories if k["removed"]]
        notes += [f"missing {m['feature']} {'now' if m['new'] else 'no longer'} follows it"
                  for m in c.missing]
        label = c.new.id if c.old.id == c.new.id else f"{c.old.id} (now {c.new.id})"
        changed.append(f"<li><code>{escape(label)}</code>: {escape('; '.join(notes))}</li>")
    section("Changed rules", changed)
    return "".join(parts)


def _events_table(events: Sequence[dict], limit: int = 200) -> str:
    rows = []
    for e in events[-limit:]:
        rows.append(f"<tr><td class=n>{e['record']:,}</td><td>{escape(str(e.get('time', '')))}"
                    f"</td><td>{escape(str(e['kind']))}</td><td class=n>"
                    f"{escape(str(e.get('node', '')))}</td><td><code>"
                    f"{escape(event_path_text(e.get('path')))}</code></td></tr>")
    note = f"<p class=meta>The latest {limit} of {len(events)} events.</p>" \
        if len(events) > limit else ""
    return (note + "<table><tr><th>record</th><th>time</th><th>event</th><th>node</th>"
            "<th>where in the tree</th></tr>" + "".join(rows) + "</table>")


def render_report(data: ReportData, generated_at: str, title: str | None = None,
                  concern: str | None = None, exact: bool = False) -> str:
    """The whole page as HTML text (pure: the same data and time give the same bytes).
    ``concern`` overrides the run's class of concern, whose rules lead the tables;
    ``exact`` prints thresholds in full rather than in the data's resolution."""
    first, last_doc = data.snapshots[0], data.snapshots[-1]
    target = last_doc.get("target", "target")
    rows = data.metrics or _snapshot_rows(data.snapshots)
    from_log = bool(data.metrics)
    last = rows[-1] if rows else {}
    markers = _markers(data.events)
    title = title or f"sapwood report: {target}"
    kept: dict = {}
    churn = churn_table(data.snapshots, kept)
    rules = kept.get("last") or rules_from_payload(last_doc)
    simple = simplify(rules)
    concern = concern_of(last_doc, rules, concern)
    style = Thresholds.of(last_doc, exact)

    charts = []
    accuracy = _metric_series(rows, "accuracy")
    if accuracy:
        charts.append(("accuracy-chart", line_chart(
            accuracy, "accuracy-chart", "Prequential accuracy over records", "records",
            "accuracy", markers, percent=True),
            "Each record is scored before it is learned. Cumulative accuracy since the "
            "start, over the last window of records, and fading (recent records weigh "
            "more). Vertical lines mark drift events."))
    focus = _metric_series(rows, "concern")
    if focus and concern is not None:
        charts.append(("concern-chart", line_chart(
            focus, "concern-chart", f"Class of concern ({concern}) over records", "records",
            "share", markers, percent=True),
            f"Recall: the share of {concern} records the tree predicted as {concern} "
            "before learning them; precision: the share of its predictions of "
            f"{concern} that were right."))
    kappa = _metric_series(rows, "kappa")
    if kappa:
        charts.append(("kappa-chart", line_chart(
            kappa, "kappa-chart", "Agreement beyond chance over records", "records",
            "kappa", markers),
            "Cohen's kappa (accuracy beyond what the class shares give by chance) and "
            "kappa-M (beyond always predicting the majority class)."))
    xs = [float(r["records"]) for r in rows]
    if any(r.get("leaves") is not None for r in rows):
        charts.append(("tree-chart", line_chart(
            [Series("leaves (rules)", xs, [_finite(r.get("leaves")) for r in rows],
                    PALETTE[0]),
             Series("depth", xs, [_finite(r.get("depth")) for r in rows], PALETTE[1],
                    "5 3")],
            "tree-chart", "Tree size over records", "records", "count", markers),
            "Leaves are rules; depth is the longest chain of conditions."))
    if churn:
        charts.append(("churn-chart", bar_chart(
            [f"#{c['sequence']}" for c in churn], [float(c["records"]) for c in churn],
            {"new": [c["added"] for c in churn], "gone": [c["removed"] for c in churn],
             "changed": [c["changed"] for c in churn]},
            CHURN_COLORS, "churn-chart", "Rule churn per snapshot", "snapshot",
            "rules"),
            "Against the snapshot before: rules new, gone (a leaf that splits is gone and "
            "its pieces are new), and changed (a threshold moved, a category list or the "
            "outcome changed)."
            + (" Snapshots were sampled evenly for this chart." if data.sampled else "")))

    plotted = {"records": xs,
               **{key: [_finite(r.get(key)) for r in rows] for _, key, _, _ in _METRIC_LINES},
               "leaves": [_finite(r.get("leaves")) for r in rows],
               "depth": [_finite(r.get("depth")) for r in rows],
               "source": "metrics log" if from_log else "snapshots",
               "events": [{"record": e["record"], "kind": e["kind"]} for e in data.events],
               "churn": churn}

    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
           'style-src \'unsafe-inline\'; img-src data:">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{escape(title)}</title><style>{_CSS}</style></head><body><main>",
           f"<h1>{escape(title)}</h1>",
           f'<p class="meta">Generated {escape(generated_at)} from '
           + ", ".join(f"{escape(k)} <code>{escape(v)}</code>" for k, v in data.sources.items())
           + f". Latest snapshot: #{last_doc['sequence']} at {last_doc['records']:,} records"
           + (f", data up to {escape(str(last_doc['data_time']))}"
              if last_doc.get("data_time") else "") + ".</p>",
           f'<div class="safety" id="safety"><b>Safety.</b> {escape(CAUTION_IN_FULL)}</div>',
           _cards(last, last_doc, data.events)]
    if not from_log:
        out.append('<p class="meta">No metrics log was given: the charts use the '
                   "metrics stored with each snapshot.</p>")
    out.append("<h2>Over time</h2>")
    for plot_id, svg, caption in charts:
        out.append(f'<figure data-chart="{plot_id}">{svg}<figcaption>{escape(caption)}'
                   "</figcaption></figure>")
    out.append(f"<h2>Current rules ({len(rules)})</h2>")
    lead = (f"the rules predicting the class of concern ({escape(str(concern))}) first, those "
            "catching most of it first (catches: the rule's share of all its records), "
            "then the rest by predicted class and coverage" if concern is not None
            else "sorted by predicted class, then coverage")
    out.append(f'<p class="meta">Snapshot #{last_doc["sequence"]}, {lead}. Coverage is the '
               "share of learned records a rule holds; confidence the share of its records "
               "in its class.</p>")
    out.append(_rules_table(rules, target, concern=concern, style=style))
    if len(simple) < len(rules):
        out.append(f"<details><summary>The same decisions in {len(simple)} joined rules"
                   "</summary><p class=meta>Rules that predict the same class and differ "
                   "in one condition are joined; every record gets the same predicted "
                   "class as from the rules above.</p>")
        out.append(_rules_table([s.rule for s in simple], target,
                                {s.rule.id: s.sources for s in simple}, concern, style))
        out.append("</details>")
    if len(data.snapshots) > 1:
        if len(data.snapshots) == 2 and kept.get("last_diff") is not None:
            diff = dataclasses.replace(kept["last_diff"], old_header=header_of(first),
                                       new_header=header_of(last_doc))
        else:
            diff = diff_rules(kept.get("first") or rules_from_payload(first), rules,
                              header_of(first), header_of(last_doc))
        out.append("<h2>From the first snapshot to the last</h2>")
        out.append(_diff_html(diff.concern_first(concern), target,
                              Thresholds.of_both(first, last_doc, exact)))
    out.append(f"<h2>Drift events ({len(data.events)})</h2>")
    out.append(_events_table(data.events) if data.events else
               '<p class="meta">No drift events' + (" were recorded." if "drift events"
                                                   in data.sources else
                                                   " file was given.") + "</p>")
    out.append(f'<h2>Safety</h2><p>{escape(CAUTION_IN_FULL)}</p>')
    out.append('<script type="application/json" id="report-data">'
               + json.dumps(plotted, allow_nan=False).replace("</", "<\\/") + "</script>")
    out.append("</main></body></html>")
    return "\n".join(out) + "\n"


def write_report(path: str, data: ReportData, generated_at: str,
                 title: str | None = None, concern: str | None = None,
                 exact: bool = False) -> int:
    """Write the page atomically; returns its size in bytes."""
    html = render_report(data, generated_at, title, concern, exact)
    write_atomic(path, html)
    return len(html.encode("utf-8"))
