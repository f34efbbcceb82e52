"""The HTML report: plotted data against the metrics log, markers, churn, rules, no fetches.

Outside references:
* the plotted accuracy and kappa are recomputed from the run's per-record predictions
  and the true labels with scikit-learn (``accuracy_score``, ``cohen_kappa_score``;
  Cohen 1960) and compared with the points drawn in the SVG;
* kappa-M = (accuracy - p_maj) / (1 - p_maj), with p_maj the prequential accuracy of the
  majority-class classifier, which predicts the class most frequent so far (Bifet et
  al., 2015, "Efficient online evaluation of big data stream classifiers", KDD; from
  memory). Before any label, and on ties, it predicts the class seen first, as
  sapwood's metrics module documents;
* the records are river's Agrawal generator (tests/operator_runs.py).
"""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from collections import Counter

import pytest
from click.testing import CliRunner
from hypothesis import given
from hypothesis import strategies as st
from sklearn.metrics import accuracy_score, cohen_kappa_score
from tests.operator_runs import TARGET, read_csv_rows, shared_run

from stream.cli.views import report as report_command
from stream.rules.diff import diff_rules
from stream.rules.rule import rules_from_payload
from stream.rules.text import CAUTION_IN_FULL
from stream.run.snapshots import SnapshotStore
from stream.views.report import churn_table, load_report_data, render_report, write_report
from stream.views.rule_sources import header_of
from stream.views.run_logs import read_metrics
from stream.views.svg_plot import nice_domain, nice_ticks, thin_points

SVG = "{http://www.w3.org/2000/svg}"
EVENTS = [
    {"record": 10250, "time": "2025-01-01T00:00:00Z", "kind": "alarm", "node": 0,
     "path": []},
    {"record": 10400, "time": "2025-01-01T00:00:10Z", "kind": "start", "node": 0,
     "path": []},
    {"record": 13000, "time": "2025-01-01T00:01:00Z", "kind": "swap", "node": 0,
     "path": [{"feature": "age", "op": "<=", "value": 40.9}]},
]


@pytest.fixture(scope="module")
def run():
    return shared_run("majority")


@pytest.fixture(scope="module")
def page(run, tmp_path_factory):
    events = tmp_path_factory.mktemp("events") / "events.jsonl"
    events.write_text("".join(json.dumps(e) + "\n" for e in EVENTS))
    data = load_report_data(str(run.snapshots), str(run.metrics), str(events))
    return render_report(data, "2025-01-02T00:00:00Z")


def _charts(page: str) -> dict[str, ET.Element]:
    found = {}
    for block in re.findall(r"<svg .*?</svg>", page, flags=re.S):
        element = ET.fromstring(block)
        found[element.get("id")] = element
    return found


class _Axes:
    """Inverse of the chart's data -> SVG map, from the attributes it carries."""

    def __init__(self, svg: ET.Element) -> None:
        self.x0, self.x1 = map(float, svg.get("data-x-domain").split())
        self.y0, self.y1 = map(float, svg.get("data-y-domain").split())
        self.left, self.top, self.w, self.h = map(float, svg.get("data-area").split())

    def data(self, px: float, py: float) -> tuple[float, float]:
        return (self.x0 + (px - self.left) / self.w * (self.x1 - self.x0),
                self.y1 - (py - self.top) / self.h * (self.y1 - self.y0))

    def tolerance(self) -> tuple[float, float]:
        # points are written with 2 decimals: half a hundredth of a unit, plus float noise
        return (0.006 / self.w * (self.x1 - self.x0), 0.006 / self.h * (self.y1 - self.y0))


def _drawn(svg: ET.Element, series: str) -> dict[float, float]:
    axes = _Axes(svg)
    points = {}
    for line in svg.iter(f"{SVG}polyline"):
        if line.get("data-series") == series:
            for pair in line.get("points").split():
                x, y = axes.data(*map(float, pair.split(",")))
                points[round(x)] = y
    return points


def _majority_accuracy(labels: list[str]) -> list[float]:
    """Prequential accuracy of the majority-class classifier after each record."""
    order: dict[str, int] = {}
    counts: Counter = Counter()
    hits, out = 0, []
    for k, label in enumerate(labels, 1):
        order.setdefault(label, len(order))
        guess = min(order, key=lambda c: (-counts[c], order[c]))  # before seeing label
        hits += guess == label
        counts[label] += 1
        out.append(hits / k)
    return out


def test_plotted_metrics_equal_a_recomputation_from_the_predictions(run, page):
    labels = [r[TARGET] for r in read_csv_rows(run.data)]
    predicted = [r["predicted"] for r in read_csv_rows(run.predictions)]
    charts = _charts(page)
    accuracy_chart, kappa_chart = charts["accuracy-chart"], charts["kappa-chart"]
    _, y_tol_acc = _Axes(accuracy_chart).tolerance()
    _, y_tol_kappa = _Axes(kappa_chart).tolerance()
    drawn = {name: _drawn(accuracy_chart, name) for name in
             ("cumulative accuracy", "accuracy, last window")}
    drawn.update({name: _drawn(kappa_chart, name) for name in
                  ("kappa", "kappa, last window", "kappa-M")})
    majority = _majority_accuracy(labels)
    embedded = json.loads(re.search(r'<script type="application/json" id="report-data">'
                                    r"(.*?)</script>", page, re.S).group(1))
    for n in (1000, 2500, 7500, 10000, 12500, 20000):
        y, p = labels[:n], predicted[:n]
        window_y, window_p = labels[n - 1000:n], predicted[n - 1000:n]
        share = majority[n - 1]
        accuracy = accuracy_score(y, p)
        expected = {"cumulative accuracy": accuracy,
                    "accuracy, last window": accuracy_score(window_y, window_p),
                    "kappa": cohen_kappa_score(y, p),
                    "kappa, last window": cohen_kappa_score(window_y, window_p),
                    "kappa-M": (accuracy - share) / (1 - share)}
        for name, value in expected.items():
            tolerance = y_tol_acc if "accuracy" in name else y_tol_kappa
            assert drawn[name][n] == pytest.approx(value, abs=tolerance), (name, n)
        k = embedded["records"].index(n)
        assert embedded["accuracy"][k] == pytest.approx(expected["cumulative accuracy"], abs=1e-12)
        assert embedded["kappa"][k] == pytest.approx(expected["kappa"], abs=1e-12)
        assert embedded["window_kappa"][k] == pytest.approx(expected["kappa, last window"],
                                                            abs=1e-12)


def test_every_logged_row_is_drawn_and_tree_size_matches_the_log(run, page):
    rows = read_metrics(run.metrics)
    charts = _charts(page)
    accuracy = _drawn(charts["accuracy-chart"], "fading accuracy")
    assert sorted(accuracy) == [r["records"] for r in rows]
    leaves = _drawn(charts["tree-chart"], "leaves (rules)")
    depth = _drawn(charts["tree-chart"], "depth")
    _, tolerance = _Axes(charts["tree-chart"]).tolerance()
    for row in rows:
        assert leaves[row["records"]] == pytest.approx(row["leaves"], abs=tolerance)
        assert depth[row["records"]] == pytest.approx(row["depth"], abs=tolerance)


def test_drift_events_are_marked_where_they_happened(page):
    for chart in ("accuracy-chart", "kappa-chart", "tree-chart"):
        svg = _charts(page)[chart]
        axes = _Axes(svg)
        marks = sorted(((line.get("data-kind"), axes.data(float(line.get("x1")), 0)[0])
                        for line in svg.iter(f"{SVG}line") if line.get("class") == "marker"),
                       key=lambda m: m[1])
        assert [k for k, _ in marks] == [e["kind"] for e in EVENTS]
        for (_, x), event in zip(marks, EVENTS):
            assert x == pytest.approx(event["record"], abs=axes.tolerance()[0])
    assert "record 13,000: swap at node 0 (2025-01-01T00:01:00Z): age &lt;= 40.9" in page


def test_confirmed_changes_stand_out_from_alarms(page):
    svg = _charts(page)["accuracy-chart"]
    style = {line.get("data-kind"): (float(line.get("stroke-width")),
                                     float(line.get("stroke-opacity")))
             for line in svg.iter(f"{SVG}line") if line.get("class") == "marker"}
    assert style["swap"][0] > style["alarm"][0] and style["swap"][1] > style["alarm"][1]
    kinds = [line.get("data-kind") for line in svg.iter(f"{SVG}line")
             if line.get("class") == "marker"]
    assert kinds[-1] == "swap"                      # drawn over the alarms
    assert "confirmed changes (swaps)" in page and "unconfirmed alarms" in page
    assert "drift swap (confirmed change)" in page and "drift alarm (unconfirmed)" in page


def test_churn_bars_count_the_changes_between_snapshots(run, page):
    store = SnapshotStore(run.snapshots)
    documents = [store.load(e["sequence"]) for e in store.entries()]
    bars: dict[tuple[str, float], float] = {}
    for rect in _charts(page)["churn-chart"].iter(f"{SVG}rect"):
        if rect.get("data-series"):
            bars[(rect.get("data-series"), float(rect.get("data-x")))] = \
                float(rect.get("data-value"))
    assert churn_table(documents)
    for before, after in zip(documents, documents[1:]):
        counts = diff_rules(rules_from_payload(before), rules_from_payload(after)).churn()
        # every rule before is gone, changed or kept; every rule after is new or matched
        assert counts["removed"] + counts["changed"] + counts["unchanged"] == \
            len(before["rules"]) == before["rule_count"]
        assert counts["added"] + counts["changed"] + counts["unchanged"] == \
            len(after["rules"]) == after["rule_count"]
        for series, key in (("new", "added"), ("gone", "removed"), ("changed", "changed")):
            assert bars.get((series, float(after["records"])), 0) == counts[key]


def test_rules_diff_and_safety_sections(run, page):
    store = SnapshotStore(run.snapshots)
    entries = store.entries()
    first, last = store.load(entries[0]["sequence"]), store.load(entries[-1]["sequence"])
    table = re.search(r'<table class="rules">(.*?)</table>', page, re.S).group(1)
    # the snapshot keeps the rules in display order: the class of concern's first
    assert re.findall(r'<tr(?: class="concern")?><td><code>(R\d+)</code>', table) == \
        [r["id"] for r in last["rules"]]
    leading = re.findall(r'<tr class="concern"><td><code>(R\d+)</code>', table)
    assert leading == [r["id"] for r in last["rules"] if r["predict"] == last["concern"]]
    assert leading
    counts = diff_rules(rules_from_payload(first), rules_from_payload(last), header_of(first),
                        header_of(last)).churn()
    assert (f"<b>{counts['added']}</b> new, <b>{counts['removed']}</b> gone, "
            f"<b>{counts['changed']}</b> changed") in page
    assert page.count(CAUTION_IN_FULL.replace("'", "&#x27;")) == 2
    assert "<h2>Drift events (3)</h2>" in page


def test_the_page_fetches_nothing(page):
    assert '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; ' in page
    assert not re.search(r"\b(src|href|xlink:href)\s*=", page)
    assert set(re.findall(r"https?://[^\s\"'<>]+", page)) == {"http://www.w3.org/2000/svg"}
    assert re.findall(r"<script[^>]*>", page) == ['<script type="application/json" '
                                                 'id="report-data">']
    assert "@import" not in page and "url(" not in page


def test_without_a_metrics_log_the_snapshots_are_plotted(run):
    data = load_report_data(str(run.snapshots))
    page = render_report(data, "2025-01-02T00:00:00Z")
    assert "No metrics log was given" in page
    drawn = _drawn(_charts(page)["accuracy-chart"], "cumulative accuracy")
    store = SnapshotStore(run.snapshots)
    for entry in store.entries():
        document = store.load(entry["sequence"])
        assert drawn[document["records"]] == pytest.approx(document["metrics"]["accuracy"],
                                                           abs=1e-4)
    assert "No drift events file was given." in page


def test_same_input_same_bytes(run):
    data = load_report_data(str(run.snapshots), str(run.metrics))
    assert render_report(data, "t") == render_report(data, "t")


def test_report_command(run, tmp_path):
    out = tmp_path / "run.html"
    result = CliRunner().invoke(report_command, [str(run.snapshots), "--metrics",
                                                 str(run.metrics), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.output.splitlines()[-1] == str(out)
    assert out.read_text().startswith("<!DOCTYPE html>")
    assert write_report(str(tmp_path / "b.html"), load_report_data(str(run.snapshots)),
                        "t") == (tmp_path / "b.html").stat().st_size


# ----------------------------------------------------------------------- chart helpers


@given(st.lists(st.one_of(st.none(), st.floats(-1e6, 1e6)), min_size=1, max_size=3000),
       st.integers(6, 400))
def test_thinning_keeps_real_points_and_the_extremes(ys, limit):
    xs = list(range(len(ys)))
    kept = thin_points(xs, ys, limit)
    assert kept == sorted(set(kept)) and set(kept) <= set(xs)
    assert kept[-1] == len(ys) - 1
    present = [y for y in ys if y is not None]
    if present:
        values = [ys[i] for i in kept if ys[i] is not None]
        assert min(values) == min(present) and max(values) == max(present)
    if len(ys) <= limit:
        assert kept == xs
    else:
        assert len(kept) <= limit + 1


@given(st.floats(-1e6, 1e6), st.floats(1e-3, 1e6))
def test_ticks_are_round_and_cover_the_domain(low, span):
    high = low + span
    a, b = nice_domain(low, high)
    assert a <= low and b >= high
    ticks = nice_ticks(a, b)
    assert ticks and a - 1e-9 * span <= ticks[0] and ticks[-1] <= b + 1e-9 * span
    steps = {round(y - x, 9) for x, y in zip(ticks, ticks[1:])}
    assert len(steps) <= 1
