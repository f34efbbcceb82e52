"""A snapshot file edited by hand or damaged: every field a view reads is checked, so a
wrong type gives one message naming the file, rule and field, never a traceback.

Property test (hypothesis, bounded): random JSON values put in random places of a real
snapshot either are refused by the check with a ModelFileError or go through the views
(rules as text and Markdown, joining, a diff against the original) without an error.
Data: river's Agrawal generator (Agrawal, Imielinski & Swami 1993).
"""

from __future__ import annotations

import copy
import json

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st
from river.datasets import synth

from stream.errors import ModelFileError
from stream.rules.diff import diff_rules, render_diff_text
from stream.rules.document import check_rules_document
from stream.rules.markdown import rules_markdown
from stream.rules.rule import rules_from_payload
from stream.rules.simplify import simplify
from stream.rules.text import render_text
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.snapshots import SnapshotStore


@pytest.fixture(scope="module")
def document(tmp_path_factory):
    folder = tmp_path_factory.mktemp("snapshot")
    rows = ["salary,age,elevel,car,y"]
    for x, y in synth.Agrawal(classification_function=3, seed=4).take(6_000):
        rows.append(f"{x['salary']},{x['age']},e{x['elevel']},c{x['car']},{'A' if y else 'B'}")
    (folder / "a.csv").write_text("\n".join(rows) + "\n")
    run_learn(LearnJob(sources=[str(folder / "a.csv")], target="y",
                       snapshot_dir=str(folder / "s"), snapshot_every=6_000,
                       options={"grace_period": 50},
                       quarantine_path=str(folder / "q.jsonl")))
    store = SnapshotStore(folder / "s")
    loaded = store.load(store.entries()[-1]["sequence"])
    assert len(loaded["rules"]) > 3 and any(
        c["op"] in ("in", "not in") for r in loaded["rules"] for c in r["conditions"])
    return loaded


def views(doc: dict, original: dict) -> None:
    checked = check_rules_document(doc, "'edited.json'")
    rules = rules_from_payload(checked)
    render_text(rules, {k: v for k, v in checked.items() if k != "rules"})
    rules_markdown(simplify(rules), {k: v for k, v in checked.items() if k != "rules"})
    render_diff_text(diff_rules(rules_from_payload(original), rules))


def test_the_unedited_snapshot_goes_through(document):
    views(copy.deepcopy(document), document)


@pytest.mark.parametrize("edit, message", [
    (lambda d: d.update(rules="x"), "'rules' must be a list, got 'x'"),
    (lambda d: d["rules"][0].pop("conditions"), "rule 1 (R"),
    (lambda d: d["rules"][1].update(records="many"), "'records' must be a number"),
    (lambda d: d["rules"][0]["conditions"][0].update(op="~"), "'op' must be one of"),
    (lambda d: d.update(records=[1]), "'records' must be a number, got [1]"),
])
def test_a_wrong_type_is_named(document, edit, message):
    doc = copy.deepcopy(document)
    edit(doc)
    with pytest.raises(ModelFileError, match="'edited.json' is corrupt") as caught:
        views(doc, document)
    assert message in str(caught.value)


JSON = st.recursive(st.none() | st.booleans() | st.integers(-5, 10**6)
                    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=8),
                    lambda inner: st.lists(inner, max_size=3)
                    | st.dictionaries(st.text(max_size=6), inner, max_size=3),
                    max_leaves=6)


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data(), value=JSON)
def test_random_edits_give_a_message_or_go_through(document, data, value):
    doc = copy.deepcopy(document)
    place = data.draw(st.sampled_from(["header", "rule", "condition"]))
    if place == "header":
        key = data.draw(st.sampled_from(sorted(doc)))
        doc[key] = value
    else:
        rule = doc["rules"][data.draw(st.integers(0, len(doc["rules"]) - 1))]
        target = rule if place == "rule" or not rule["conditions"] else \
            rule["conditions"][data.draw(st.integers(0, len(rule["conditions"]) - 1))]
        target[data.draw(st.sampled_from(sorted(target)))] = value
    json.dumps(doc)   # still JSON
    try:
        views(doc, document)
    except ModelFileError as exc:
        assert "is corrupt" in str(exc)
