"""Which rule fired: the JSON rules against the model, explanations, and `explain`.

Outside references: records are river's Agrawal generator (tests/operator_runs.py);
the check that the snapshot's JSON rules give exactly the model's predictions uses an
evaluator written in the tests (plain Python over feature/operator/value triples and
the CSV text read by the standard library), not sapwood's code.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner
from tests.operator_runs import FEATURES, TARGET, read_csv_rows, rules_that_hold, shared_run

from stream.cli.views import explain
from stream.errors import ConfigError, InputError
from stream.rules.rule import rules_from_payload
from stream.run.saved_model import load_model
from stream.run.snapshots import SnapshotStore
from stream.views.explain import (RuleMatcher, explain_batch, file_batches, match_rules,
                                  record_batches)


def _last_snapshot(run) -> dict:
    store = SnapshotStore(run.snapshots)
    return store.load(store.entries()[-1]["sequence"])


@pytest.mark.parametrize("leaf_model", ["majority", "adaptive"])
def test_json_rules_give_the_models_predictions_on_10k_records(leaf_model):
    """The final snapshot is taken after the last record is learned, so it describes the
    saved model; `sapwood score` of 10 000 new records writes the model's prediction and
    rule id for each. Exactly one JSON rule must hold for each record, with that id; with
    majority-class leaves its class must be the model's prediction."""
    run = shared_run(leaf_model)
    rules = _last_snapshot(run)["rules"]
    records = read_csv_rows(run.holdout)
    scored = read_csv_rows(run.scored)
    assert len(records) == len(scored) == 10000
    for record, prediction in zip(records, scored):
        (rule,) = rules_that_hold(rules, record)
        assert rule["id"] == prediction["rule"]
        if leaf_model == "majority":
            assert (rule["predict"] or "") == prediction["predicted"]
    assert len({p["rule"] for p in scored}) > 3  # many rules were exercised


@pytest.fixture(scope="module")
def run():
    return shared_run("majority")


@pytest.fixture(scope="module")
def saved(run):
    return load_model(str(run.model))


def test_explanations_name_the_scoring_rule_and_the_path(run, saved):
    scored = read_csv_rows(run.scored)
    records = read_csv_rows(run.holdout)
    rules = {r["id"]: r for r in _last_snapshot(run)["rules"]}
    seen = 0
    for batch in file_batches([str(run.holdout)], None):
        explained, rejects = explain_batch(saved, batch)
        assert not rejects
        for item in explained:
            k = item.line - 2  # line 1 is the header
            assert item.rule.id == scored[k]["rule"]
            assert (item.predicted or "") == scored[k]["predicted"]
            # the JSON keeps 3 decimals of the (fractional) class weights
            assert item.rule.class_counts == pytest.approx(rules[item.rule.id]["class_counts"],
                                                           abs=5e-4)
            assert len(item.path) == item.rule.depth
            for step in item.path:
                raw = records[k][step.feature]
                if raw == "":
                    assert step.value == "missing" and step.by_default
                else:
                    assert float(step.value) == float(raw)
            assert {c.feature for c in item.rule.conditions} <= {s.feature for s in item.path}
            seen += 1
    assert seen == 10000


def test_match_rules_agrees_with_the_evaluator(run):
    document = _last_snapshot(run)
    rules = rules_from_payload(document)
    matcher = RuleMatcher(rules)
    records = read_csv_rows(run.holdout)
    assert [r.id for r in match_rules(rules, records[0])] == \
        [r["id"] for r in rules_that_hold(document["rules"], records[0])]
    for record in records[:5000]:
        found = matcher.match(record)
        assert [r.id for r in found] == [r["id"] for r in rules_that_hold(document["rules"],
                                                                          record)]


def test_match_rules_names_a_bad_number(run):
    rules = rules_from_payload(_last_snapshot(run))
    numeric = next(c.feature for r in rules for c in r.conditions if c.op in ("<=", ">"))
    with pytest.raises(ConfigError, match=f"field '{numeric}': 'abc' is not a number"):
        match_rules(rules, {numeric: "abc"})


def test_record_text_forms(saved):
    names = saved.schema.names
    json_record = json.dumps({"salary": 50000, "age": 61, "elevel": 3, "car": 5, "zipcode": 2,
                              "commission": 0, "hvalue": 100000, "hyears": 10, "loan": 1000})
    csv_record = "50000,0,61,3,5,2,100000,10,1000,"
    batches = list(record_batches([json_record, csv_record], names))
    assert [b.origin for b in batches] == ["record 1", "record 2"]
    (a,), _ = explain_batch(saved, batches[0])
    (b,), _ = explain_batch(saved, batches[1])
    assert a.rule.id == b.rule.id and a.predicted == b.predicted
    with pytest.raises(InputError, match=r"record 1: a CSV record needs 10 fields in the order "
                                         r"salary, commission, .*; got 2"):
        list(record_batches(["1,2"], names))
    with pytest.raises(InputError, match="record 1: not a JSON object"):
        list(record_batches(["{salary: 1}"], names))


def _runner() -> CliRunner:
    # click < 8.2 mixes stderr into the output unless told not to; 8.2 keeps them apart
    if "mix_stderr" in CliRunner.__init__.__code__.co_varnames:
        return CliRunner(mix_stderr=False)
    return CliRunner()


def test_explain_command_with_a_model(run):
    runner = _runner()
    record = json.dumps({"salary": 50000, "age": 61, "elevel": 3, "car": 5})
    result = runner.invoke(explain, [str(run.model), "--record", record])
    assert result.exit_code == 0, result.output
    first = result.stdout.splitlines()[0]
    assert first.startswith(f"record 1: {TARGET} = ") and ", by rule R" in first
    assert "path from the root:" in result.stdout
    assert result.stdout.rstrip().endswith("licensed practice.")
    as_json = runner.invoke(explain, [str(run.model), str(run.holdout), "--form", "json",
                                      "--limit", "5"])
    rows = [json.loads(line) for line in as_json.stdout.splitlines()]
    scored = read_csv_rows(run.scored)[:5]
    assert [r["rule"] for r in rows] == [s["rule"] for s in scored]
    assert [r["line"] for r in rows] == [2, 3, 4, 5, 6]
    bad = runner.invoke(explain, [str(run.model), "--record",
                                  json.dumps({"salary": "lots"})])
    assert bad.exit_code == 0
    assert "record 1, field 'salary': 'lots' is not a number (not explained)" in bad.stderr


def test_explain_command_with_a_snapshot(run):
    runner = CliRunner()
    record = {name: "1" for name in FEATURES}
    result = runner.invoke(explain, [str(run.snapshots), "--record", json.dumps(record),
                                     "--form", "json"])
    assert result.exit_code == 0, result.output
    answer = json.loads(result.output.splitlines()[0])
    expected = rules_that_hold(_last_snapshot(run)["rules"], record)
    assert answer["rules"] == [r["id"] for r in expected]
    refused = runner.invoke(explain, [str(run.snapshots), "--record", "1,2,3"])
    assert isinstance(refused.exception, ConfigError)
    assert "a CSV line needs the model for the field order" in str(refused.exception)
    nothing = runner.invoke(explain, [str(run.model)])
    assert isinstance(nothing.exception, ConfigError)
    assert str(nothing.exception) == ("give a record (--record TEXT) or a file of records "
                                      "(SOURCE)")
