"""The benchmark machinery (stream/bench.py) on tiny streams; no timing is asserted.

Outside references named beside the checks: river 0.26.1 (its generators, its
``evaluate.progressive_val_score`` and its ``HoeffdingTreeClassifier``, which sapwood's
majority leaf model matches record for record on SEA and Agrawal, see DEVELOPERS.md
and tests/classify/test_model.py); the SEA concept of Street & Kim (KDD 2001); pandas.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from river import evaluate, metrics, tree
from river.datasets import synth

from stream.bench import common, output, streams
from stream.bench.command import command, run_bench
from stream.bench.common import Bench, Check, Column, SuiteResult
from stream.bench.end_to_end import learn_child, write_sea_csv
from stream.bench.learners import learners_suite
from stream.bench.output import render_markdown, render_text
from stream.errors import SapwoodError


def _rows(payload: dict, suite: str) -> list[dict]:
    return payload["suites"][suite]["rows"]


@pytest.fixture(scope="module")
def tiny_learners(tmp_path_factory):
    """One run of the learner suite through the command: 2000 records of SEA and Agrawal."""
    out = tmp_path_factory.mktemp("bench") / "tiny.json"
    result = CliRunner().invoke(command, ["--suite", "learners", "--records", "2000",
                                          "--stream", "sea", "--stream", "agrawal",
                                          "--out", str(out)])
    assert result.exit_code == 0, result.output
    return result, json.loads(out.read_text()), out.with_suffix(".md").read_text()


def test_learner_rows_cover_each_stream_and_pairing(tiny_learners):
    result, payload, markdown = tiny_learners
    rows = _rows(payload, "learners")
    assert [(r["stream"], r["pairing"]) for r in rows] == [
        ("sea", "defaults"), ("sea", "majority"), ("sea", "with-drift"),
        ("agrawal", "defaults"), ("agrawal", "majority"), ("agrawal", "with-drift")]
    for row in rows:
        assert row["records"] == row["stream_records"] == 2000
        assert row["ratio"] == pytest.approx(row["sapwood_rps"] / row["river_rps"])
        assert 0.5 < row["sapwood_accuracy"] <= 1 and 0.5 < row["river_accuracy"] <= 1
    # the defaults carry the two targets per stream, the majority pairing none
    checks = payload["suites"]["learners"]["checks"]
    assert [c["what"].split(":")[0] for c in checks] == ["sea", "sea", "agrawal", "agrawal"]
    for check in checks:
        assert check["verdict"] == ("target met" if check["met"] else check["verdict"])
        assert check["verdict"].startswith(("target met", "MISSED by "))
    assert "ratio" in result.output and "sapwood rec/s" in result.output
    assert markdown.count("\n| sea ") == 3 and "|:---|:---|---:|" in markdown


def test_majority_pairing_sees_the_same_records_as_river(tiny_learners):
    # river 0.26.1 HoeffdingTreeClassifier(leaf_prediction="mc") and sapwood's majority
    # leaves predict alike record for record on SEA and Agrawal (DEVELOPERS.md,
    # tests/classify/test_model.py): equal predictions prove both learners got the same
    # records, features (Agrawal's nominal ones as codes) and labels.
    _, payload, _ = tiny_learners
    for row in _rows(payload, "learners"):
        if row["pairing"] == "majority":
            assert row["same_prediction"] == 1.0, row["stream"]
            assert row["sapwood_accuracy"] == row["river_accuracy"]


def test_river_side_matches_rivers_own_prequential_evaluation(tmp_path):
    # Timing river on a prefix: the accuracy reported must be river's own on the first
    # 600 records of SEA(variant 0, noise 0.1, seed 1), as river.evaluate computes it.
    # river's metric skips the first record (no prediction yet); the bench counts it as
    # wrong, so the numbers of correct predictions are compared.
    run = Bench(tmp_path, records=1500, river_records={"sea": 600}, streams=("sea",),
                say=lambda message: None)
    result = learners_suite(run)
    default = result.rows[0]
    assert (default["records"], default["stream_records"]) == (600, 1500)
    reference = metrics.Accuracy()
    evaluate.progressive_val_score(synth.SEA(variant=0, noise=0.1, seed=1).take(600),
                                   tree.HoeffdingTreeClassifier(), reference)
    assert round(default["river_accuracy"] * 600) == \
        round(reference.get() * reference.cm.total_weight)
    assert any("first 600 records only" in note for note in result.notes)
    assert 0.5 < default["sapwood_accuracy_all"] <= 1


def test_sea_csv_follows_the_published_concept(tmp_path):
    # SEA (Street & Kim, KDD 2001): label positive iff x0 + x1 <= 8 (variant 0); the
    # benchmark file flips 10 % of labels, so the disagreement must be 0.1 within 4 sd.
    path = write_sea_csv(tmp_path / "sea.csv", 20_000, seed=3, chunk=7_000)
    frame = pd.read_csv(path)
    assert list(frame.columns) == ["x0", "x1", "x2", "label"] and len(frame) == 20_000
    assert frame[["x0", "x1", "x2"]].to_numpy().min() >= 0
    assert frame[["x0", "x1", "x2"]].to_numpy().max() <= 10
    flipped = ((frame.x0 + frame.x1 <= 8) != (frame.label == "yes")).mean()
    assert abs(flipped - 0.1) < 4 * math.sqrt(0.09 / 20_000)


def test_end_to_end_and_memory_suites_on_small_files(tmp_path):
    run = Bench(tmp_path, csv_rows=3000, memory_rows=(2000, 6000), repeats=1,
                say=lambda message: None)
    e2e, memory = run_bench(run, ["end-to-end", "memory"])
    assert [r["workload"] for r in e2e.rows] == ["sea-numeric", "reefer-telemetry"]
    for row in e2e.rows:
        assert row["rows"] == row["sapwood_records"] == 3000   # pandas and sapwood agree
        assert row["ratio"] == pytest.approx(row["sapwood_rps"] / row["pandas_rps"])
        assert row["sapwood_quarantined"] == 0
    assert [c.target for c in e2e.checks] == [0.5, 0.5]
    assert [r["rows"] for r in memory.rows] == [2000, 6000, 2000]
    assert [r["sapwood_records"] for r in memory.rows] == [2000, 6000, 2000]
    assert memory.rows[2]["stream"] == "SEA + 2,000-value tag"
    small, large, tagged = (r["peak_mb"] for r in memory.rows)
    assert small > 0 and large > 0 and tagged > 0
    assert memory.checks[1].value == pytest.approx(large / small)
    assert memory.checks[3].value == pytest.approx(tagged / small)
    text = render_text([e2e, memory], output.environment())
    assert "read_csv rows/s" in text and "peak MB" in text and text.count("target ") >= 4


def test_feeds_suite_learns_every_record_from_each_feed(tmp_path):
    """Each row is a real child run: every record of the file, the Redis stream and the
    MQTT backlog learned exactly once; checkpoints every 10k plus one at the end."""
    from connectors.local_brokers import MOSQUITTO, REDIS_SERVER

    run = Bench(tmp_path, records=12_000, repeats=1, say=lambda message: None)
    (feeds,) = run_bench(run, ["feeds"])
    expected = [("CSV file", "none"), ("CSV file", "every 10,000")]
    try:
        import pyarrow  # noqa: F401  (the optional extra adds the Parquet row)
        expected.append(("Parquet file", "none"))
    except ImportError:
        pass
    if REDIS_SERVER is not None:
        expected += [("Redis stream", "none"), ("Redis stream", "every 10,000"),
                     ("Redis stream, fence=false", "none")]
    if MOSQUITTO is not None:
        expected += [("MQTT topic", "none"), ("MQTT topic, 100 records per message", "none")]
    assert [(r["feed"], r["checkpoint"]) for r in feeds.rows] == expected
    assert all(r["records"] == 12_000 for r in feeds.rows)
    assert [r["checkpoints"] for r in feeds.rows if r["checkpoint"] != "none"] == \
        [2] * (len([r for r in feeds.rows if r["checkpoint"] != "none"]))
    accuracies = {round(r["accuracy"], 12) for r in feeds.rows}
    assert len(accuracies) == 1      # the same records in the same order, whatever the feed
    assert feeds.rows[0]["vs_file"] == pytest.approx(1.0)


def test_child_peak_is_not_the_parents(tmp_path):
    # A child's ru_maxrss on Linux starts from its parent's high-water mark (kept across
    # exec); the bench reads the child's own VmHWM instead. Make this process's peak far
    # larger than a child's and check the child's figure stays below it.
    ballast = np.ones(100_000_000)   # 800 MB, touched
    path = write_sea_csv(tmp_path / "tiny.csv", 300, seed=1)
    run = learn_child(Bench(tmp_path, say=lambda message: None), path, "label", pipe=True)
    assert run.summary["records"] == 300
    assert 0 < run.peak_mb < ballast.nbytes / 1e6
    del ballast


def test_check_verdicts():
    assert Check("ratio", 80.0, 100.0).verdict() == "MISSED by 20.0x"
    assert Check("ratio", 0.42, 0.5).verdict() == "MISSED by 0.08x"
    assert Check("ratio", 120.0, 100.0).verdict() == "target met"
    assert Check("peak", 320.0, 300.0, "<=", "MB").verdict() == "MISSED by 20.0 MB"
    assert Check("peak", 300.0, 300.0, "<=", "MB").verdict() == "target met"
    assert Check("acc", 0.8584, 0.8586, ">=", "%").verdict() == "MISSED by 0.0200 pt"
    assert Check("acc", 0.5, 0.500005, ">=", "%").verdict() == "MISSED by 0.0005 pt"
    assert Check("acc", None, 0.5).verdict() == "not measured"
    assert Check("acc", math.nan, 0.5).met is None
    assert Check("peak", 320.0, 300.0, "<=", "MB").describe() == \
        "peak: 320.0 MB (target <= 300.0 MB): MISSED by 20.0 MB"


def test_markdown_table_has_one_line_per_row(monkeypatch, tmp_path):
    def tiny_suite(run: Bench) -> SuiteResult:
        return SuiteResult("tiny", "a tiny suite",
                           [Column("name", "name", left=True), Column("rate", "rate",
                                                                      lambda v: f"{v:,.0f}")],
                           [{"name": "a", "rate": 1234.5}, {"name": "bb", "rate": None}],
                           [Check("rate", 1234.5, 2000.0)], ["made up"])

    monkeypatch.setitem(common.SUITES, "tiny", tiny_suite)
    results = run_bench(Bench(tmp_path), ["tiny"])
    env = output.environment()
    markdown = render_markdown(results, env).splitlines()
    start = markdown.index("| name | rate |")
    assert markdown[start:start + 4] == ["| name | rate |", "|:---|---:|", "| a | 1,234 |",
                                         "| bb |  |"]
    assert "- rate: 1,234.5x (target >= 2,000.0x): MISSED by 765.5x" in markdown
    text = render_text(results, env).splitlines()
    start = text.index("name   rate")
    assert text[start:start + 4] == ["name   rate", "----  -----", "a     1,234", "bb"]
    assert text[-1] == "  rate: 1,234.5x (target >= 2,000.0x): MISSED by 765.5x"


def test_suites_and_streams_are_registries(tmp_path):
    assert list(common.SUITES) == ["learners", "drift", "regression", "end-to-end", "memory",
                                  "feed-path", "feeds", "rules", "false-changes", "keyed"]
    assert list(streams.STREAMS) == ["sea", "agrawal", "hyperplane", "rbf10", "rbf100", "led"]
    assert streams.STREAMS["rbf100"].min_ratio == 50 and streams.STREAMS["sea"].min_ratio == 100
    with pytest.raises(SapwoodError, match="suite must be one of"):
        run_bench(Bench(tmp_path), ["nope"])
    with pytest.raises(SapwoodError, match="stream must be one of"):
        Bench(tmp_path, streams=("nope",))


@pytest.mark.parametrize("value, message", [
    ("sea=0", "river records must be a whole number >= 1, got '0'"),
    ("abc", "river records must be a whole number >= 1, got 'abc'"),
    ("nope=5", "stream must be one of sea, agrawal"),
])
def test_bad_river_records_are_usage_errors(value, message):
    result = CliRunner().invoke(command, ["--river-records", value])
    assert result.exit_code == 2
    assert message in result.output


def test_river_prefix_per_stream_and_for_all(tmp_path):
    run = Bench(tmp_path, records=1000, river_records={"*": 400, "led": 900})
    assert [run.river_prefix(s) for s in ("sea", "led")] == [400, 900]
    assert Bench(tmp_path, records=300, river_records={"*": 400}).river_prefix("sea") == 300


def test_rules_suite_times_the_views_of_a_bushy_tree(tmp_path):
    run = Bench(tmp_path, csv_rows=20_000, repeats=1, say=lambda message: None)
    (result,) = run_bench(run, ["rules"])
    steps = [r["step"] for r in result.rows]
    assert steps[1:] == ["compare the two snapshots", "sapwood notes (whole command)",
                         "sapwood report (whole command)"]
    assert result.rows[0]["rules"] > 100      # grace period 4 grows a bushy tree
    assert all(r["seconds"] > 0 for r in result.rows)
    assert [c.unit for c in result.checks] == ["s", "s"]
    assert (tmp_path / "rules.html").exists()


def test_feed_path_suite_learns_every_record_three_ways(tmp_path):
    run = Bench(tmp_path, records=3_000, streams=("agrawal",), repeats=1,
                say=lambda message: None)
    (result,) = run_bench(run, ["feed-path"])
    # the regression streams run whatever learner streams are chosen
    assert [(r["stream"], r["drift"]) for r in result.rows] == [
        (name, drift) for name in ("agrawal", "friedman", "wide-friedman-50")
        for drift in ("off", "adwin")]
    for row in result.rows:
        assert row["learned"] == [3_000, 3_000]       # file and stdin: every record
        assert row["file_ratio"] == pytest.approx(row["file_rps"] / row["memory_rps"])
    # the in-memory run learns the records as the file holds them: the same scores
    assert not [note for note in result.notes if note.startswith("WARNING")]
    # per stream: file and stdin, drift off and ADWIN; Friedman from the file vs river
    assert [c.target for c in result.checks] == [0.8] * 8 + [50.0] + [0.8] * 4


def test_false_changes_suite_counts_per_million_records(tmp_path):
    run = Bench(tmp_path, records=4_000, repeats=1, say=lambda message: None)
    (result,) = run_bench(run, ["false-changes"])
    assert [r["stream"] for r in result.rows] == ["sea", "agrawal", "rbf10", "led",
                                                  "friedman (regression)"]
    for row in result.rows:
        assert row["swaps"] <= row["starts"] or row["starts"] == 0
        for value in (row["alarms"], row["starts"], row["swaps"]):
            count = value * 4_000 / 1_000_000       # back to a count of events
            assert count >= 0 and count == pytest.approx(round(count))
    assert [c.target for c in result.checks] == [1.0, 5.0] * 5


def test_keyed_suite_compares_keys_with_one_tree_on_the_same_file(tmp_path):
    run = Bench(tmp_path, records=10_000, streams=("sea",), repeats=1,
                say=lambda message: None)
    (result,) = run_bench(run, ["keyed"])
    # one tree and 10 keys, drift off and ADWIN; 100 keys with 10 in memory, ADWIN
    assert [(r["drift"], r["keys"], r["in_memory"]) for r in result.rows] == [
        ("off", 1, 1), ("off", 10, 10), ("adwin", 1, 1), ("adwin", 10, 10),
        ("adwin", 100, 10)]
    assert result.rows[-1]["evictions"] > 0
    assert not [n for n in result.notes if n.startswith("WARNING")]   # every record learned
    for row in result.rows[1:2] + result.rows[3:4]:
        one = [r for r in result.rows if r["drift"] == row["drift"] and r["keys"] == 1][0]
        assert row["ratio"] == pytest.approx(row["rps"] / one["rps"])
    assert [c.target for c in result.checks] == [0.5, 0.5]
