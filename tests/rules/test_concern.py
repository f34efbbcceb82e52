"""The class of concern first (stream/rules/concern.py): ordering, the short listing and
the fallback for rule sets written before runs recorded a class of concern. Hand-derived
examples: the expected orders follow from the counts written here."""

from __future__ import annotations

from stream.rules.concern import catches, concern_of, concern_order, top_rules
from stream.rules.rule import Rule


def _rule(number: int, predict: str | None, counts: dict, estimate: dict | None = None) -> Rule:
    records = sum(counts.values()) if counts else 10.0
    return Rule(id=f"R{number}", conditions=(), predict=predict,
                confidence=max(counts.values()) / records if counts else 0.0,
                coverage=records / 1000, records=records, class_counts=counts, scored=0,
                hits=0, depth=1, created_at=0, leaf_model="majority", active=True,
                estimate=estimate)


RULES = [
    _rule(1, "ok", {"ok": 400, "fault": 10}),
    _rule(2, "fault", {"ok": 5, "fault": 20}),     # catches 20/100, precision 0.80
    _rule(3, "ok", {"ok": 300, "fault": 30}),
    _rule(4, "fault", {"ok": 30, "fault": 20}),    # catches 20/100, precision 0.40
    _rule(5, "fault", {"ok": 2, "fault": 20}),     # catches 20/100, precision 0.91
]


def test_rules_predicting_the_concern_lead_most_caught_then_most_often_right():
    ordered = [r.id for r in concern_order(RULES, "fault")]
    assert ordered == ["R5", "R2", "R4", "R1", "R3"]
    assert catches(RULES, "fault")["R3"] == 30 / 100
    assert [r.id for r in concern_order(RULES, None)] == [r.id for r in RULES]


def test_a_short_listing_keeps_the_concern_then_the_widest_rules():
    assert [r.id for r in top_rules(RULES, "fault", 4)] == ["R5", "R2", "R4", "R1"]
    assert [r.id for r in top_rules(RULES, "fault", 2)] == ["R5", "R2"]
    assert [r.id for r in top_rules(RULES, None, 2)] == ["R1", "R3"]


def test_the_concern_comes_from_the_view_then_the_run_then_the_rarest_class():
    assert concern_of({"concern": "ok"}, RULES, "fault") == "fault"
    assert concern_of({"concern": "ok"}, RULES) == "ok"
    assert concern_of({"concern": None}, RULES) is None    # fewer labels than needed yet
    assert concern_of({}, RULES) == "fault"                # written before: 100 < 745


def test_a_numeric_target_orders_by_predicted_value_when_asked():
    rules = [_rule(k, None, {}, {"mean": mean}) for k, mean in ((1, 2.0), (2, 9.5), (3, -1))]
    assert [r.id for r in concern_order(rules, "high")] == ["R2", "R1", "R3"]
    assert [r.id for r in concern_order(rules, "low")] == ["R3", "R1", "R2"]
    assert concern_of({}, rules) is None
    assert [r.id for r in concern_order(rules, None)] == ["R1", "R2", "R3"]
