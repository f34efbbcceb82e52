"""Rule diffs: matching across snapshots, what is reported, text, JSON and the command.

Outside references: the rule sets compared come from real runs on river's Agrawal
generator (tests/operator_runs.py); "carved from" / "covered by" are checked against
which rules river-generated records actually satisfy before and after, using an
evaluator written for the tests over the snapshot JSON (not sapwood's code).
"""

from __future__ import annotations

import json
import random

import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st
from tests.operator_runs import read_csv_rows, rules_that_hold, shared_run

from stream.cli.views import diff as diff_command
from stream.errors import ConfigError, InputError
from stream.rules.diff import diff_rules, render_diff_text
from stream.rules.rule import Rule, rules_from_payload
from stream.run.snapshots import SnapshotStore
from stream.tree.paths import Condition
from stream.views.rule_sources import load_side, pick_pair


def make_rule(rule_id: str, *conditions, predict: str | None = "yes", no: float = 10,
              yes: float = 90) -> Rule:
    total = no + yes
    return Rule(id=rule_id, conditions=tuple(Condition(*c) for c in conditions),
                predict=predict, confidence=max(no, yes) / total if total else 0.0,
                coverage=total / 1000, records=total, class_counts={"no": no, "yes": yes},
                scored=int(total), hits=int(max(no, yes)), depth=len(conditions),
                created_at=0, leaf_model="majority", active=True)


@pytest.fixture(scope="module")
def run():
    return shared_run("majority")


@pytest.fixture(scope="module")
def snapshot_rules(run):
    store = SnapshotStore(run.snapshots)
    return [rules_from_payload(store.load(e["sequence"])) for e in store.entries()]


# ----------------------------------------------------------------------- matching


def test_same_rules_with_new_ids_all_match(snapshot_rules):
    rules = snapshot_rules[-1]
    renamed = [Rule(**{**r.__dict__, "id": f"R{1000 + k}"}) for k, r in enumerate(rules)]
    result = diff_rules(rules, renamed)
    assert result.churn() == {"added": 0, "removed": 0, "changed": 0,
                              "unchanged": len(rules), "outcome_changed": 0,
                              "thresholds_moved": 0}
    assert {(c.old.id, c.new.id) for c in result.matched} == \
        {(r.id, f"R{1000 + k}") for k, r in enumerate(rules)}


def _thresholds(rules: list[Rule]) -> dict[str, list[float]]:
    found: dict[str, set] = {}
    for r in rules:
        for c in r.conditions:
            if c.op in ("<=", ">"):
                found.setdefault(c.feature, set()).add(c.value)
    return {f: sorted(v) for f, v in found.items()}


@settings(max_examples=40, deadline=None)
@given(data=st.data())
def test_small_threshold_moves_keep_every_rule(snapshot_rules, data):
    """Every split threshold of a real tree moves by less than an eighth of the gap to
    the next threshold on its feature, and ids are shuffled: every rule must still be
    matched to its own moved self, with each move reported exactly."""
    rules = snapshot_rules[-1]
    moved_to: dict[tuple[str, float], float] = {}
    for feature, values in _thresholds(rules).items():
        gaps = [b - a for a, b in zip(values, values[1:])] or [abs(values[0]) or 1.0]
        room = min(gaps) / 8
        for v in values:
            fraction = data.draw(st.floats(-1, 1, allow_nan=False))
            moved_to[(feature, v)] = v + fraction * room
    order = list(range(len(rules)))
    random.Random(data.draw(st.integers(0, 10**6))).shuffle(order)
    moved = []
    for k, r in enumerate(rules):
        conditions = tuple(Condition(c.feature, c.op, moved_to.get((c.feature, c.value), c.value)
                                     if c.op in ("<=", ">") else c.value, c.missing, c.branch)
                           for c in r.conditions)
        moved.append(Rule(**{**r.__dict__, "id": f"N{order[k]}", "conditions": conditions}))
    result = diff_rules(rules, moved)
    assert not result.added and not result.removed
    assert {(c.old.id, c.new.id) for c in result.matched} == \
        {(r.id, f"N{order[k]}") for k, r in enumerate(rules)}
    for change in result.matched:
        for move in change.moves:
            assert move["new"] == moved_to[(move["feature"], move["old"])]
            assert move["by"] == move["new"] - move["old"]


def test_moved_split_threshold_reported_in_feature_units():
    old = [make_rule("R1", ("supply_temp", "<=", 5.0)),
           make_rule("R2", ("supply_temp", ">", 5.0), predict="no", no=80, yes=20)]
    new = [make_rule("R7", ("supply_temp", "<=", 5.5)),
           make_rule("R8", ("supply_temp", ">", 5.5), predict="no", no=80, yes=20)]
    result = diff_rules(old, new)
    assert [(c.old.id, c.new.id) for c in result.matched] == [("R1", "R7"), ("R2", "R8")]
    assert result.matched[0].moves == [{"feature": "supply_temp", "bound": "upper",
                                         "old": 5.0, "new": 5.5, "by": 0.5}]
    assert result.matched[1].moves == [{"feature": "supply_temp", "bound": "lower",
                                         "old": 5.0, "new": 5.5, "by": 0.5}]
    assert result.churn()["thresholds_moved"] == 2


def test_a_leaf_that_splits_is_gone_and_its_pieces_are_new():
    # the piece 'x <= 2' has the shape of 'x <= 5', yet it is a piece, not a move
    old = [make_rule("R1", ("x", "<=", 5.0)), make_rule("R2", ("x", ">", 5.0), predict="no")]
    new = [make_rule("R3", ("x", "<=", 2.0)),
           make_rule("R4", ("x", ">", 2.0), ("x", "<=", 5.0), predict="no"),
           make_rule("R2", ("x", ">", 5.0), predict="no")]
    result = diff_rules(old, new)
    assert [(c.old.id, c.new.id) for c in result.matched] == [("R2", "R2")]
    assert [(r.id, ids) for r, ids in result.removed] == [("R1", ["R3", "R4"])]
    assert [(r.id, ids) for r, ids in result.added] == [("R3", ["R1"]), ("R4", ["R1"])]


def test_rules_joined_into_one_are_gone_and_the_joined_rule_new():
    old = [make_rule("R3", ("x", "<=", 2.0)), make_rule("R4", ("x", ">", 2.0), ("x", "<=", 5.0)),
           make_rule("R2", ("x", ">", 5.0), predict="no")]
    new = [make_rule("R9", ("x", "<=", 5.0)), make_rule("R2", ("x", ">", 5.0), predict="no")]
    result = diff_rules(old, new)
    assert [(r.id, ids) for r, ids in result.added] == [("R9", ["R3", "R4"])]
    assert sorted(r.id for r, _ in result.removed) == ["R3", "R4"]


def test_a_far_move_that_no_longer_overlaps_is_not_a_move():
    old = [make_rule("R1", ("x", ">", 3.0), ("x", "<=", 4.0))]
    new = [make_rule("R1", ("x", ">", 5.0), ("x", "<=", 6.0))]
    result = diff_rules(old, new)
    assert not result.matched
    assert [r.id for r, _ in result.added] == ["R1"] and [r.id for r, _ in result.removed] == ["R1"]


def test_outcome_categories_and_missing_values():
    old = [make_rule("R1", ("cargo", "in", ("chilled",)), ("door_min", ">", 14.0, True)),
           make_rule("R2", ("cargo", "in", ("frozen", "pharma")), predict="no")]
    new = [make_rule("R1", ("cargo", "in", ("chilled", "pharma")),
                     ("door_min", ">", 14.0, False), predict="no", no=60, yes=40),
           make_rule("R2", ("cargo", "in", ("frozen",)), predict="no")]
    result = diff_rules(old, new)
    first, second = result.matched
    assert first.predict_changed and (first.old.predict, first.new.predict) == ("yes", "no")
    assert first.missing == [{"feature": "door_min", "old": True, "new": False}]
    assert first.categories == [{"feature": "cargo", "op": "in", "added": ["pharma"],
                                 "removed": []}]
    assert second.categories == [{"feature": "cargo", "op": "in", "added": [],
                                  "removed": ["pharma"]}]
    assert result.churn()["outcome_changed"] == 1 and not result.added


def test_a_new_category_branch_is_carved_from_the_catch_all_rule():
    old = [make_rule("R1", ("cargo", "in", ("chilled",))),
           make_rule("R2", ("cargo", "not in", ("chilled",), True), predict="no")]
    new = [make_rule("R1", ("cargo", "in", ("chilled",))),
           make_rule("R3", ("cargo", "not in", ("bananas", "chilled"), True), predict="no"),
           make_rule("R5", ("cargo", "in", ("bananas",)))]
    result = diff_rules(old, new)
    assert [(c.old.id, c.new.id) for c in result.matched] == [("R1", "R1")]
    assert [(r.id, ids) for r, ids in result.removed] == [("R2", ["R3", "R5"])]
    assert [(r.id, ids) for r, ids in result.added] == [("R3", ["R2"]), ("R5", ["R2"])]


# ----------------------------------------------------------------------- against records


def test_carved_from_and_covered_by_agree_with_the_records(run, snapshot_rules):
    """For every pair of consecutive snapshots and every held-out record without a blank
    value: if the rule that holds for it afterwards is new, the rule that held before is
    among those it was carved from; if the rule before is gone, the rule after is among
    those that cover it now."""
    rows = [r for r in read_csv_rows(run.holdout) if all(v != "" for v in r.values())][:3000]
    store = SnapshotStore(run.snapshots)
    documents = [store.load(e["sequence"]) for e in store.entries()]
    checked = 0
    for before, after in zip(documents, documents[1:]):
        result = diff_rules(rules_from_payload(before), rules_from_payload(after))
        carved = {r.id: set(ids) for r, ids in result.added}
        covered = {r.id: set(ids) for r, ids in result.removed}
        for record in rows:
            (old,) = rules_that_hold(before["rules"], record)
            (new,) = rules_that_hold(after["rules"], record)
            if new["id"] in carved:
                assert old["id"] in carved[new["id"]]
            if old["id"] in covered:
                assert new["id"] in covered[old["id"]]
            checked += 1
    assert checked >= 3000 * (len(documents) - 1)


# ----------------------------------------------------------------------- text and JSON


def test_text_rendering_exact():
    old = [make_rule("R1", ("supply_temp", "<=", 5.0)),
           make_rule("R2", ("supply_temp", ">", 5.0), predict="no", no=80, yes=20)]
    new = [make_rule("R1", ("supply_temp", "<=", 5.25), no=20, yes=80),
           make_rule("R3", ("supply_temp", ">", 5.25), ("door", "in", ("open",)), no=30, yes=70),
           make_rule("R4", ("supply_temp", ">", 5.25), ("door", "not in", ("open",), True),
                     predict="no", no=80, yes=20)]
    text = render_diff_text(diff_rules(old, new, {"target": "alarm", "sequence": 3,
                                                  "records": 5000},
                                       {"target": "alarm", "sequence": 4, "records": 10000}))
    assert text == """\
Rule changes for alarm
  before: snapshot 3 (5,000 records), 2 rules
  after:  snapshot 4 (10,000 records), 3 rules
  2 new, 1 gone, 1 changed (1 thresholds moved, 0 outcomes changed), 0 kept

New rules
  R3  IF supply_temp > 5.25 AND door = open
      THEN alarm = yes  (confidence 70.0%, coverage 10.0%)
      carved from R2
  R4  IF supply_temp > 5.25 AND door not in {open} *
      THEN alarm = no  (confidence 80.0%, coverage 10.0%)
      carved from R2

Rules gone
  R2  IF supply_temp > 5
      THEN alarm = no  (was confidence 80.0%, coverage 10.0%)
      now covered by R1, R3, R4

Changed rules
  R1  IF supply_temp <= 5.25
      supply_temp upper bound 5 -> 5.25 (+0.25)
      confidence 90.0% -> 80.0% (-10.0 points), coverage 10.0% -> 10.0% (0.0 points)

0 rules kept their conditions and outcome.
* also records where the field is missing;  + also values not seen when the split was made
"""


def test_json_form_is_strict_json_with_counts():
    old = [make_rule("R1", ("x", "<=", 5.0)), make_rule("R2", ("x", ">", 5.0), predict="no")]
    new = [make_rule("R1", ("x", "<=", 4.5)), make_rule("R2", ("x", ">", 4.5), predict="no")]
    payload = diff_rules(old, new, {"sequence": 1}, {"sequence": 2}).to_dict()
    text = json.dumps(payload, allow_nan=False)
    back = json.loads(text)
    assert back["format"] == "sapwood-rule-diff" and back["version"] == 1
    assert back["counts"]["changed"] == 2 and back["counts"]["thresholds_moved"] == 2
    assert back["matched"][0]["moves"] == [{"feature": "x", "bound": "upper", "old": 5.0,
                                            "new": 4.5, "by": -0.5}]
    assert back["matched"][0]["conditions"] == [{"feature": "x", "op": "<=", "value": 4.5,
                                                 "missing": False}]


# ----------------------------------------------------------------------- loading and command


def test_pick_pair_defaults_and_choices(run):
    sequences = [e["sequence"] for e in SnapshotStore(run.snapshots).entries()]
    (a, _), (b, _) = pick_pair([str(run.snapshots)])
    assert (a["sequence"], b["sequence"]) == tuple(sequences[-2:])
    (a, _), (b, _) = pick_pair([str(run.snapshots)], first=1)
    assert (a["sequence"], b["sequence"]) == (1, sequences[-1])
    (a, _), (b, _) = pick_pair([str(run.snapshots)], last=3)
    assert (a["sequence"], b["sequence"]) == (2, 3)
    header, rules = load_side(str(run.model))
    assert header["source"] == "model.sapwood" and rules


def test_pick_pair_refusals(tmp_path, run):
    store = SnapshotStore(tmp_path / "one")
    store.write(10, {"rules": []}, "", when=1.7e9)
    with pytest.raises(InputError, match="holds 1 snapshot; a diff needs two"):
        pick_pair([str(tmp_path / "one")])
    with pytest.raises(ConfigError, match="give one snapshot directory or two snapshots"):
        pick_pair([str(run.model)] * 3)
    with pytest.raises(InputError, match="cannot read 'nowhere': no such file or directory"):
        pick_pair(["nowhere"])
    with pytest.raises(ConfigError, match="a snapshot number needs a snapshot directory"):
        pick_pair([str(run.model), str(run.model)], first=1)
    with pytest.raises(ConfigError, match="one path must be a snapshot directory"):
        pick_pair([str(run.model)])


def test_command_text_json_markdown(run):
    runner = CliRunner()
    text = runner.invoke(diff_command, [str(run.snapshots), "--from", "1"])
    assert text.exit_code == 0, text.output
    assert text.output.startswith("Rule changes for approved\n  before: snapshot 1 (")
    as_json = runner.invoke(diff_command, [str(run.snapshots), "--form", "json"])
    assert as_json.exit_code == 0
    payload = json.loads(as_json.output)
    entries = SnapshotStore(run.snapshots).entries()
    assert payload["new"]["sequence"] == entries[-1]["sequence"]
    assert payload["old"]["sequence"] == entries[-2]["sequence"]
    markdown = runner.invoke(diff_command, [str(run.snapshots), "--from", "1", "--form",
                                            "markdown"])
    assert markdown.exit_code == 0 and markdown.output.startswith("### Changes since snapshot 1")
    files = [str(run.snapshots / entries[0]["json"]), str(run.snapshots / entries[-1]["json"])]
    both = runner.invoke(diff_command, files)
    assert both.exit_code == 0
    assert both.output.splitlines()[1] == f"  before: snapshot 1 (2,500 records, " \
        f"{entries[0]['written_at']}), {entries[0]['headline']['rules']} rules"


def test_command_refuses_a_negative_shift(run):
    result = CliRunner().invoke(diff_command, [str(run.snapshots), "--min-shift", "-1"])
    assert isinstance(result.exception, ConfigError)
    assert str(result.exception) == ("--min-shift must be a number of percentage points >= 0, "
                                     "got -1")


def test_origin_and_fate_wording():
    from stream.rules.diff import fate_note, origin_note

    assert origin_note(["R2"]) == "carved from R2"
    assert fate_note(["R9"]) == "absorbed into R9"
    many = [f"R{k}" for k in range(12)]
    assert origin_note(many) == "takes over from R0, R1, R2, R3, R4, R5, R6, R7, R8, R9 and 2 more"
    assert fate_note(many[:2]) == "now covered by R0, R1"
    assert origin_note([]) == fate_note([]) == ""
