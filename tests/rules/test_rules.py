"""Rules (stream/rules.py): what they mean, how they are merged and how they read.

What is checked, and against what:

* meaning: an evaluator written here, in plain Python over the JSON rules (feature /
  operator / value triples plus the ``missing`` flag, as a third party would read a
  snapshot, tests/README.md "Contracts"), assigns every record to exactly one rule, and that rule is
  the one sapwood reports as fired, with the class sapwood predicts. Records come from
  river's Agrawal generator (Agrawal, Imielinski & Swami, 1993; elevel, car and zipcode
  are nominal per river's docs) with missing values and unseen categories written in;
* merging and text: golden tests on a small tree built by hand in the node tables
  (stream/tables.py is the written-down layout), whose every figure is worked out in the
  comments, so the expected text is derived, not copied from the output;
* the rules partition the input space (module docstring of stream/rules.py), checked with
  hypothesis against the compiled router on that hand-built tree.
"""

from __future__ import annotations

import contextlib
import csv
import io
import itertools
import json
import math
import random
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from river.datasets import synth

from stream.classify.model import TreeClassifier
from stream.classify.settings import TreeSettings
import stream.classify.tables as tables
from stream.classify.tables import (CHILD_START, CREATED, DEPTH, EQUALS, FEATURE, HITS,
                                    KIND, LEAF, MULTIWAY, N_CHILDREN, NUMERIC, PARENT,
                                    S_ACTIVE, S_CHILD_USED, S_CLASSES_SEEN, S_LEARNED,
                                    S_LEAVES, S_NODES, SCORED, SLOT, THRESHOLD, WEIGHT)
from stream.cli.main import main
from stream.rules.classify import extract_rules
from stream.rules.rule import (Rule, rule_id, rule_ids, rules_from_payload, rules_payload,
                               sort_rules)
from stream.rules.text import render_text
from stream.rules.thresholds import format_number
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.scoring import score_sources
from stream.tree.paths import Condition, merge_conditions

AGRAWAL_KEYS = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue",
                "hyears", "loan")
NOMINAL_PREFIX = {"elevel": "e", "car": "car", "zipcode": "z"}  # nominal in river's docs
MISSING_TEXT = ("", "NA")  # two of the markers sapwood reads as missing (pandas' defaults)


# ================================================================ an independent evaluator

def condition_holds(condition: dict, raw: str, kind: str) -> bool:
    """One JSON condition on one raw CSV value, as a third party would apply it."""
    if raw in MISSING_TEXT:
        return condition["missing"]
    op, value = condition["op"], condition["value"]
    if kind == "numeric":
        x = float(raw)
        if op == "<=":
            return x <= value
        if op == ">":
            return x > value
    else:
        if op == "in":
            return raw in value
        if op == "not in":
            return raw not in value
    raise AssertionError(f"operator {op!r} on a {kind} field")


def rules_for(record: dict, rules: list[dict], kinds: dict) -> list[dict]:
    return [r for r in rules
            if all(condition_holds(c, record[c["feature"]], kinds[c["feature"]])
                   for c in r["conditions"])]


# ================================================================ learned rules

def write_agrawal(path: Path, n: int, seed: int, function: int, missing: float,
                  new_categories: float = 0.0) -> Path:
    """River Agrawal records as CSV with values blanked out at random (fixed seed) and,
    optionally, category labels the learner never saw."""
    rng = random.Random(seed)
    pairs = itertools.islice(synth.Agrawal(classification_function=function, seed=seed), n)
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(list(AGRAWAL_KEYS) + ["group"])
        for x, y in pairs:
            row = []
            for k in AGRAWAL_KEYS:
                if rng.random() < missing:
                    row.append(rng.choice(MISSING_TEXT))
                elif k in NOMINAL_PREFIX:
                    unseen = rng.random() < new_categories
                    row.append(f"{NOMINAL_PREFIX[k]}{90 + x[k] if unseen else x[k]}")
                else:
                    row.append(repr(float(x[k])))
            writer.writerow(row + [str(y)])
    return path


@pytest.fixture(scope="module")
def learned(tmp_path_factory):
    """20,000 records learned with majority leaves; 10,000 fresh ones scored."""
    where = tmp_path_factory.mktemp("rules")
    train = write_agrawal(where / "train.csv", 20_000, seed=3, function=3, missing=0.03)
    test = write_agrawal(where / "test.csv", 10_000, seed=11, function=3, missing=0.05,
                         new_categories=0.02)
    summary = run_learn(LearnJob(
        sources=[str(train)], target="group", settings=TreeSettings(leaf_model="majority"),
        save_path=str(where / "model.sapwood"), predictions_path=str(where / "learn.jsonl"),
        quarantine_path=str(where / "q.jsonl")))
    score_sources(str(where / "model.sapwood"), [str(test)], None,
                  str(where / "score.jsonl"), str(where / "q2.jsonl"))
    return where, summary


@pytest.fixture(scope="module")
def rules_json(learned) -> dict:
    """The model's rules as `sapwood rules MODEL --format json` prints them."""
    where, _ = learned
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer), pytest.raises(SystemExit) as stop:
        main(["rules", str(where / "model.sapwood"), "--form", "json"])
    assert stop.value.code == 0
    return json.loads(buffer.getvalue())


def _read(path: Path) -> list[dict]:
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def _jsonl(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def test_every_scored_record_fires_exactly_the_rule_sapwood_names(learned, rules_json):
    where, summary = learned
    kinds = {f["name"]: f["kind"] for f in summary["schema"]["fields"]}
    assert {kinds[k] for k in NOMINAL_PREFIX} == {"category"}
    rules = rules_json["rules"]
    assert len(rules) == summary["leaves"] > 5
    used_ops = {c["op"] for r in rules for c in r["conditions"]}
    assert {"<=", ">"} <= used_ops and used_ops & {"in", "not in"}
    records, predictions = _read(where / "test.csv"), _jsonl(where / "score.jsonl")
    assert len(records) == len(predictions) == 10_000
    with_missing = sum(any(record[k] in MISSING_TEXT for k in AGRAWAL_KEYS)
                       for record in records)
    assert with_missing > 2_000  # the check must cover missing values
    for record, predicted in zip(records, predictions, strict=True):
        fired = rules_for(record, rules, kinds)
        assert len(fired) == 1, (predicted["line"], [r["id"] for r in fired])
        assert fired[0]["id"] == predicted["rule"], predicted["line"]
        assert (fired[0]["predict"] or "") == predicted["predicted"], predicted["line"]


def test_learning_predictions_name_the_rule_of_the_final_tree_after_the_last_split(
        learned, rules_json):
    # each record is scored before it is learned, with the tree as it then was; from the
    # last split on (the newest leaf's created_at) the tree has its final shape
    where, summary = learned
    kinds = {f["name"]: f["kind"] for f in summary["schema"]["fields"]}
    rules = rules_json["rules"]
    last_split = max(r["created_at"] for r in rules)
    records, predictions = _read(where / "train.csv"), _jsonl(where / "learn.jsonl")
    assert len(records) == len(predictions) == 20_000
    tail = list(zip(records, predictions, strict=True))[last_split:]
    assert tail, "the stream must go on after its last split for this check to mean much"
    for record, predicted in tail:
        fired = rules_for(record, rules, kinds)
        assert [r["id"] for r in fired] == [predicted["rule"]], predicted["line"]


# ================================================================ a tree built by hand

FEATURES = ["temp", "door", "pressure"]
KINDS = ["numeric", "category", "numeric"]
DOOR = ["closed", "open", "ajar"]   # "ajar" is a known label with no branch of its own
CLASSES = ["ok", "fault"]

# node: (kind, feature, threshold, children, weight, counts [ok, fault], slot, scored, hits)
#   0  temp <= 10 -> 1, else 2                       weight 185
#   1  door == open -> 3, else 4                     weight 55  (heaviest child: 4)
#   2  door multiway: closed -> 5, open -> 6         weight 130 (heaviest child: 5)
#   5  pressure <= 2.5 -> 9, else 10                 weight 100 (heaviest child: 9)
#   6  temp <= 20.125 -> 7, else 8                   weight 30  (heaviest child: 8)
# Missing values follow the heaviest child, so: at 0 missing temp goes to 2 (130 > 55).
NODES = {
    0: (NUMERIC, 0, 10.0, [1, 2], 185.0, None, -1, 0, 0),
    1: (EQUALS, 1, 1.0, [3, 4], 55.0, None, -1, 0, 0),
    2: (MULTIWAY, 1, 0.0, [5, 6, -1, -1], 130.0, None, -1, 0, 0),
    3: (LEAF, -1, 0.0, [], 5.0, [1, 4], 0, 0, 0),
    4: (LEAF, -1, 0.0, [], 50.0, [48, 2], -1, 0, 0),   # inactive: no statistics slot
    5: (NUMERIC, 2, 2.5, [9, 10], 100.0, None, -1, 0, 0),
    6: (NUMERIC, 0, 20.125, [7, 8], 30.0, None, -1, 0, 0),
    7: (LEAF, -1, 0.0, [], 8.0, [6, 2], 1, 0, 0),
    8: (LEAF, -1, 0.0, [], 22.0, [2, 20], 2, 0, 0),
    9: (LEAF, -1, 0.0, [], 70.0, [63, 7], 3, 60, 54),
    10: (LEAF, -1, 0.0, [], 30.0, [10, 20], 4, 0, 0),
}


# Columns added to the node table for drift handling (stream/tables.py): a hand-built
# node sits in the main tree with no alternate, no detector and no swap behind it.
_NO_DRIFT = {"ALT": -1, "DET": -1, "SWAPPED": -1, "ALT_OF": -1, "STATUS": 0}


def hand_built() -> TreeClassifier:
    model = TreeClassifier(FEATURES, KINDS, TreeSettings(leaf_model="majority"))
    model.classes_ = list(CLASSES)
    t = model.tables_
    t.node_i[:] = 0
    t.node_f[:] = 0.0
    t.child_table[:] = -1
    parent, depth, branch = {0: -1}, {0: 0}, {0: 0}
    used = 0
    for n, (kind, feature, threshold, children, weight, counts, slot, scored, hits) in \
            sorted(NODES.items()):
        for position, c in enumerate(children):
            if c >= 0:
                parent[c], depth[c], branch[c] = n, depth[n] + 1, position
        t.node_i[n, KIND], t.node_i[n, FEATURE], t.node_i[n, SLOT] = kind, feature, slot
        t.node_i[n, CHILD_START], t.node_i[n, N_CHILDREN] = used, len(children)
        t.node_i[n, PARENT], t.node_i[n, DEPTH] = parent[n], depth[n]
        t.node_i[n, CREATED] = 10 * n
        for name, value in {**_NO_DRIFT, "BRANCH": branch[n]}.items():
            if hasattr(tables, name):
                t.node_i[n, getattr(tables, name)] = value
        t.child_table[used:used + len(children)] = children
        used += len(children)
        t.node_f[n, THRESHOLD], t.node_f[n, WEIGHT] = threshold, weight
        t.node_f[n, SCORED], t.node_f[n, HITS] = scored, hits
        if counts is not None:
            t.counts[n, :2] = counts
    assert t.cats.shape[3] - 1 == 4  # a multiway block has one entry per category code
    t.state[S_NODES], t.state[S_LEAVES], t.state[S_ACTIVE] = 11, 6, 5
    t.state[S_CLASSES_SEEN], t.state[S_CHILD_USED], t.state[S_LEARNED] = 2, used, 185
    return model


HEADER = {"target": "status", "records": 185, "accuracy": 0.8123}

# Worked out by hand from the tree above (coverage = leaf weight / 185; confidence = top
# class share; order: predicted label, then coverage, largest first):
#   R10 fault 20/30 = 66.7%, 30/185 = 16.2%     R8 fault 20/22 = 90.9%, 22/185 = 11.9%
#   R3  fault 4/5   = 80.0%,  5/185 =  2.7%     R9 ok    63/70 = 90.0%, 70/185 = 37.8%
#   R4  ok    48/50 = 96.0%, 50/185 = 27.0%     R7 ok     6/8  = 75.0%,  8/185 =  4.3%
# temp on the path of R8: > 10 (missing: node 2 is heaviest) and > 20.125 (missing: node
# 8 is heaviest) merge to "temp > 20.125 *" (missing too); on R7's: > 10 (missing) and
# <= 20.125 (not missing: 7 is lighter) merge to "10 < temp <= 20.125", missing only if
# every step admits it.
GOLDEN_TEXT = """\
sapwood rules for status
185 records learned | 6 rules | prequential accuracy 81.2%

R10  IF   temp > 10 *
     AND  door = closed *+
     AND  pressure > 2.5
     THEN status = fault
          confidence 66.7%, coverage 16.2%, 30 records (ok 10 / fault 20)

R8   IF   temp > 20.125 *
     AND  door = open
     THEN status = fault
          confidence 90.9%, coverage 11.9%, 22 records (ok 2 / fault 20)

R3   IF   temp <= 10
     AND  door = open
     THEN status = fault
          confidence 80.0%, coverage 2.7%, 5 records (ok 1 / fault 4)

R9   IF   temp > 10 *
     AND  door = closed *+
     AND  pressure <= 2.5 *
     THEN status = ok
          confidence 90.0%, coverage 37.8%, 70 records (ok 63 / fault 7)
          scored right 90.0% of 60

R4   IF   temp <= 10
     AND  door not in {open} *
     THEN status = ok
          confidence 96.0%, coverage 27.0%, 50 records (ok 48 / fault 2)
          not growing

R7   IF   10 < temp <= 20.125
     AND  door = open
     THEN status = ok
          confidence 75.0%, coverage 4.3%, 8 records (ok 6 / fault 2)

* also records where the field is missing;  + also values not seen when the split was made

Learned rules describe what the data showed so far. They are advisory, not safety interlocks: \
defer to site safety systems, local codes and licensed practice.
"""


def test_hand_built_tree_renders_the_golden_text():
    rules = extract_rules(hand_built(), {"door": DOOR})
    assert render_text(rules, HEADER) == GOLDEN_TEXT


def test_hand_built_tree_rules_as_json():
    rules = {r.id: r.to_dict() for r in extract_rules(hand_built(), {"door": DOOR})}
    expected = {
        "id": "R9",
        "conditions": [
            {"feature": "temp", "op": ">", "value": 10.0, "missing": True},
            {"feature": "door", "op": "not in", "value": ["open"], "missing": True,
             "branch": ["closed"]},
            {"feature": "pressure", "op": "<=", "value": 2.5, "missing": True},
        ],
        "predict": "ok", "confidence": 0.9, "coverage": 0.378378, "records": 70.0,
        "class_counts": {"ok": 63.0, "fault": 7.0}, "scored": 60, "hits": 54,
        "accuracy": 0.9, "depth": 3, "created_at": 90, "leaf_model": "majority",
        "active": True}
    # drift fields, where the version has them, must say no drift touched this tree; a
    # class rule has no numeric estimate
    drift = {"drift": "stable", "replaced_at": None, "estimate": None}
    assert {k: rules["R9"][k] for k in expected} == expected
    assert set(rules["R9"]) <= set(expected) | set(drift)
    assert {k: v for k, v in rules["R9"].items() if k in drift} in ({}, drift)
    assert rules["R4"]["conditions"] == [
        {"feature": "temp", "op": "<=", "value": 10.0, "missing": False},
        {"feature": "door", "op": "not in", "value": ["open"], "missing": True}]
    assert rules["R4"]["active"] is False and rules["R4"]["accuracy"] is None
    assert rules["R7"]["conditions"] == [
        {"feature": "temp", "op": ">", "value": 10.0, "missing": False},
        {"feature": "temp", "op": "<=", "value": 20.125, "missing": False},
        {"feature": "door", "op": "in", "value": ["open"], "missing": False}]


def test_rendering_is_pure_and_order_is_stable():
    rules = extract_rules(hand_built(), {"door": DOOR})
    before = [r.to_dict() for r in rules]
    shuffled = list(rules)
    random.Random(4).shuffle(shuffled)
    assert sort_rules(shuffled) == rules
    assert render_text(rules, dict(HEADER)) == render_text(rules, dict(HEADER))
    assert [r.to_dict() for r in rules] == before  # not mutated


def test_json_form_round_trips():
    rules = extract_rules(hand_built(), {"door": DOOR})
    payload = json.loads(json.dumps(rules_payload(rules, {"target": "status"})))
    assert payload["rule_count"] == 6
    back = rules_from_payload(payload)
    assert [r.to_dict() for r in back] == [r.to_dict() for r in rules]
    assert render_text(back, HEADER) == GOLDEN_TEXT


# a record: temp, door code, pressure; NaN is missing. Door codes 0..2 are known labels
# (2 has no branch), 3 and 7 are labels the tree never saw (7 is beyond the branch block).
_temps = st.one_of(st.sampled_from([math.nan, 10.0, 20.125, 10.000001, 20.124999]),
                   st.floats(-50, 50, allow_nan=False))
_doors = st.sampled_from([math.nan, 0.0, 1.0, 2.0, 3.0, 7.0])
_pressures = st.one_of(st.sampled_from([math.nan, 2.5, 2.4999999]),
                       st.floats(0, 5, allow_nan=False))


def _door_label(code: float) -> str:
    if math.isnan(code):
        return ""
    code = int(code)
    return DOOR[code] if code < len(DOOR) else f"new{code}"


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(_temps, _doors, _pressures), min_size=1, max_size=20))
def test_hand_built_rules_partition_records_as_the_router_does(records):
    model = hand_built()
    rules = [r.to_dict() for r in extract_rules(model, {"door": DOOR})]
    kinds = dict(zip(FEATURES, KINDS, strict=True))
    X = np.array(records, dtype=np.float64)
    with np.errstate(all="raise"):
        scored = model.predict(X)
    for (temp, door, pressure), leaf, pred in zip(records, scored.leaf, scored.pred, strict=True):
        raw = {"temp": "" if math.isnan(temp) else repr(temp), "door": _door_label(door),
               "pressure": "" if math.isnan(pressure) else repr(pressure)}
        fired = rules_for(raw, rules, kinds)
        assert [r["id"] for r in fired] == [rule_id(leaf)], raw
        assert fired[0]["predict"] == CLASSES[pred]


# ================================================================ merging

def test_numeric_bounds_merge_to_the_tightest_interval():
    steps = [(0, ">", 1.0, True, None), (0, "<=", 9.0, True, None), (1, "<=", 5.0, False, None),
             (0, ">", 3.0, True, None), (0, "<=", 7.0, True, None)]
    assert merge_conditions(steps, ["x", "y"]) == (
        Condition("x", ">", 3.0, True), Condition("x", "<=", 7.0, True),
        Condition("y", "<=", 5.0, False))


def test_a_merged_condition_admits_missing_only_if_every_step_did():
    steps = [(0, ">", 1.0, True, None), (0, "<=", 9.0, False, None)]
    assert merge_conditions(steps, ["x"]) == (Condition("x", ">", 1.0, False),
                                              Condition("x", "<=", 9.0, False))


def test_category_sets_intersect_and_exclusions_accumulate():
    steps = [(0, "in", {"a", "b", "c"}, False, None), (0, "not in", {"b"}, False, None)]
    assert merge_conditions(steps, ["k"]) == (Condition("k", "in", ("a", "c"), False),)
    steps = [(0, "not in", {"b"}, True, {"a"}), (0, "not in", {"c"}, True, {"a", "d"})]
    merged = merge_conditions(steps, ["k"])
    assert merged == (Condition("k", "not in", ("b", "c"), True, ("a",)),)


# ================================================================ text pieces

@pytest.mark.parametrize("value, text", [
    (0.0, "0"), (10.0, "10"), (12.5, "12.5"), (-2.0, "-2"), (1 / 3, "0.3333"),
    (102448.1359794585, "102448.136"), (20.125, "20.125"), (0.00001234, "1.23e-05"),
    (-0.00001, "-1e-05"), (1234567.0, "1234567"),
])
def test_thresholds_print_with_at_most_four_decimals(value, text):
    assert format_number(value) == text


def test_an_empty_tree_reads_always():
    rule = Rule(id="R0", conditions=(), predict=None, confidence=0.0, coverage=0.0,
                records=0.0, class_counts={}, scored=0, hits=0, depth=0, created_at=0,
                leaf_model="majority", active=True)
    text = render_text([rule], {"target": "fault"})
    assert text.splitlines()[:6] == ["sapwood rules for fault", "1 rule", "",
                                     "R0  ALWAYS", "    THEN (no records yet)",
                                     "         confidence 0.0%, coverage 0.0%, 0 records"]


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(0, 5000), max_size=60))
def test_rule_ids_of_a_batch_are_each_leafs_rule_id(leaves):
    got = rule_ids(np.array(leaves, dtype=np.int64))
    assert got.dtype == object and got.tolist() == [rule_id(leaf) for leaf in leaves]
