"""Rule simplification: merged bounds, dropped conditions, joined rules, order.

Outside reference: the claim that joined rules decide exactly as the tree is checked on
10 000 held-out records of river's Agrawal generator (tests/operator_runs.py) with an
evaluator written for the tests over the JSON condition triples, not sapwood's code.
"""

from __future__ import annotations

import pytest
from tests.operator_runs import read_csv_rows, rules_that_hold, shared_run

from stream.rules.rule import Rule, rules_from_payload
from stream.rules.simplify import simplify, tidy
from stream.run.snapshots import SnapshotStore
from stream.tree.paths import Condition


def make_rule(rule_id, *conditions, predict="yes", no=10.0, yes=90.0):
    total = no + yes
    return Rule(id=rule_id, conditions=tuple(Condition(*c) for c in conditions),
                predict=predict, confidence=max(no, yes) / total, coverage=total / 1000,
                records=total, class_counts={"no": no, "yes": yes}, scored=int(total),
                hits=int(max(no, yes)), depth=len(conditions), created_at=5,
                leaf_model="majority", active=True)


@pytest.fixture(scope="module", params=["majority", "adaptive"])
def run(request):
    return shared_run(request.param)


def test_tidy_merges_bounds_and_drops_what_excludes_nothing():
    rule = make_rule("R1", ("x", ">", 1.0), ("x", ">", 2.0), ("x", "<=", 9.0),
                     ("x", "<=", 7.5), ("c", "in", ("a", "b")), ("c", "not in", ("b",)),
                     ("d", "not in", (), True))
    assert tidy(rule).conditions == (Condition("x", ">", 2.0), Condition("x", "<=", 7.5),
                                     Condition("c", "in", ("a",)))


def test_siblings_with_the_same_outcome_are_joined_and_a_covering_condition_dropped():
    rules = [make_rule("R1", ("door", "in", ("open",)), ("ambient", "<=", 28.0, True)),
             make_rule("R2", ("door", "in", ("open",)), ("ambient", ">", 28.0), no=5, yes=15),
             make_rule("R3", ("door", "not in", ("open",), True), predict="no", no=70, yes=5)]
    result = simplify(rules)
    assert [s.rule.id for s in result] == ["S1", "S2"]
    no_rule, yes_rule = result
    assert yes_rule.sources == ("R1", "R2")
    assert yes_rule.rule.conditions == (Condition("door", "in", ("open",)),)
    assert yes_rule.rule.class_counts == {"no": 15.0, "yes": 105.0}
    assert yes_rule.rule.confidence == pytest.approx(105 / 120)
    assert yes_rule.rule.records == 120 and yes_rule.rule.coverage == pytest.approx(0.12)
    assert no_rule.sources == ("R3",) and no_rule.rule.predict == "no"


def test_pieces_with_a_gap_or_different_outcomes_stay_apart():
    gap = [make_rule("R1", ("x", "<=", 1.0)), make_rule("R2", ("x", ">", 2.0)),
           make_rule("R3", ("x", ">", 1.0), ("x", "<=", 2.0), predict="no")]
    assert len(simplify(gap)) == 3
    present_only = [make_rule("R1", ("x", "<=", 1.0)), make_rule("R2", ("x", ">", 1.0))]
    # together they mean "x is present", which no single condition can say
    assert len(simplify(present_only)) == 2


def test_category_pieces_join_into_one_set():
    rules = [make_rule("R1", ("cargo", "in", ("frozen",))),
             make_rule("R2", ("cargo", "in", ("pharma",))),
             make_rule("R3", ("cargo", "not in", ("frozen", "pharma", "chilled")),
                       predict="yes"),
             make_rule("R4", ("cargo", "in", ("chilled",)), predict="no")]
    (_, yes_rule) = simplify(rules)
    assert yes_rule.rule.conditions == (Condition("cargo", "not in", ("chilled",)),)
    assert set(yes_rule.sources) == {"R1", "R2", "R3"}


def test_simplified_rules_decide_exactly_as_the_tree_on_real_records(run):
    """Each of 10 000 held-out records satisfies exactly one simplified rule, whose
    predicted class is that of the one tree rule the record satisfies, and which lists
    that rule among its sources."""
    store = SnapshotStore(run.snapshots)
    document = store.load(store.entries()[-1]["sequence"])
    result = simplify(rules_from_payload(document))
    simplified = [{**s.rule.to_dict(), "sources": s.sources} for s in result]
    assert len(simplified) <= len(document["rules"])
    for record in read_csv_rows(run.holdout):
        (exact,) = rules_that_hold(document["rules"], record)
        (joined,) = rules_that_hold(simplified, record)
        assert joined["predict"] == exact["predict"]
        assert exact["id"] in joined["sources"]


def test_order_counts_and_sources_over_every_snapshot(run):
    store = SnapshotStore(run.snapshots)
    for entry in store.entries():
        rules = rules_from_payload(store.load(entry["sequence"]))
        result = simplify(rules)
        keys = [(s.rule.predict is None, s.rule.predict or "", -s.rule.coverage) for s in result]
        assert keys == sorted(keys)
        assert sorted(i for s in result for i in s.sources) == sorted(r.id for r in rules)
        assert sum(s.rule.records for s in result) == pytest.approx(sum(r.records for r in rules))
        assert simplify(rules) == result  # deterministic


def test_input_is_not_mutated():
    rules = [make_rule("R1", ("x", "<=", 1.0)), make_rule("R2", ("x", ">", 1.0), ("x", "<=", 3.0))]
    before = [r.__dict__.copy() for r in rules]
    simplify(rules)
    assert [r.__dict__ for r in rules] == before


def plain_scan(rules):
    """The joining written the direct way, as a reference: every pass rebuilds the
    buckets of every rule and tries each free rule with every later free one. (The
    module's version skips buckets and pairs that cannot join; results must agree.)"""
    from stream.rules.regions import region_of
    from stream.rules.rule import sort_rules
    from stream.rules.simplify import _try_join

    current = [tidy(r) for r in rules]
    joined = True
    while joined:
        joined = False
        buckets: dict[tuple, list[int]] = {}
        for k, rule in enumerate(current):
            region = region_of(rule.conditions)
            for feature in region:
                rest = tuple(sorted((f, s) for f, s in region.items() if f != feature))
                buckets.setdefault((rule.predict, feature, rest), []).append(k)
        used: set[int] = set()
        result = []
        for members in buckets.values():
            free = [k for k in members if k not in used]
            for x in range(len(free)):
                if free[x] in used:
                    continue
                for y in range(x + 1, len(free)):
                    if free[y] in used:
                        continue
                    a, b = current[free[x]], current[free[y]]
                    found = _try_join(a, b, region_of(a.conditions), region_of(b.conditions))
                    if found is not None:
                        used.update((free[x], free[y]))
                        result.append(found[0])
                        joined = True
                        break
        result.extend(r for k, r in enumerate(current) if k not in used)
        current = result
    return sort_rules(current)


def test_joining_agrees_with_trying_every_pair(run):
    store = SnapshotStore(run.snapshots)
    for entry in store.entries():
        rules = rules_from_payload(store.load(entry["sequence"]))
        expected = plain_scan(rules)
        got = [s.rule for s in simplify(rules)]
        assert [r.conditions for r in got] == [r.conditions for r in expected]
        assert [r.records for r in got] == [r.records for r in expected]


def test_joining_agrees_with_trying_every_pair_on_pieces_and_categories():
    # pieces of one axis in scrambled order, a category split and a gap
    pieces = [make_rule(f"R{k}", ("x", ">", float(lo)), ("x", "<=", float(lo + 1)),
                        ("c", "in", ("a",) if k % 3 else ("b",)),
                        predict="yes" if k % 5 else "no")
              for k, lo in enumerate([4, 0, 7, 1, 3, 2, 9, 5, 6, 12, 10, 11])]
    pieces.append(make_rule("R99", ("x", ">", 20.0), ("c", "in", ("a", "b"))))
    expected = plain_scan(pieces)
    got = [s.rule for s in simplify(pieces)]
    assert [r.conditions for r in got] == [r.conditions for r in expected]
    assert len(got) < len(pieces)
