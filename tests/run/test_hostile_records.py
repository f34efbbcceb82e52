"""One record must not stop a run, nor a value make the run's results unwritable.

Outside references: IEEE 754 binary64 (numpy.finfo(float64).max, about 1.8e308: a value
above its square root, about 1.34e154, squares to infinity); the Unicode Standard,
chapter 3 ("U+FFFD Substitution of Maximal Subparts"): ill-formed text is replaced with
U+FFFD; RFC 8259 section 8.2 (a JSON string may escape a lone surrogate, which is not a
character). Data: river's Friedman #1 generator (Friedman 1991) for the regression stream.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from river.datasets import synth

from connectors.broker_payloads import parse_payloads
from connectors.jsonlines import JsonLinesReader
from stream.checks import VALUE_LIMIT
from stream.cli.main import main
from stream.errors import EXIT_OUTPUT, OutputError
from stream.run.engine import LearnRun, run_learn
from stream.run.job import LearnJob
from stream.run.model_file import read_model_file

POISON_ROW = 1_500


def friedman_csv(path: Path, n: int, poison: float | None) -> Path:
    keys = [f"x{i}" for i in range(10)]
    rows = [",".join(keys + ["y"])]
    for i, (x, y) in enumerate(synth.Friedman(seed=7).take(n)):
        value = poison if (poison is not None and i == POISON_ROW) else y
        rows.append(",".join(repr(float(x[k])) for k in range(10)) + f",{float(value)!r}")
    path.write_text("\n".join(rows) + "\n")
    return path


def test_the_value_limit_leaves_room_for_squares_of_many_records():
    # IEEE 754: the largest float64; sums of squares of 1e100-sized values of 1e100
    # records stay finite
    assert VALUE_LIMIT ** 2 * 1e100 < np.finfo(np.float64).max
    with np.errstate(over="ignore"):
        assert np.isinf(np.float64(1.35e154) ** 2)


@pytest.mark.parametrize("poison", [1e200, -1.4e154, float("inf")])
def test_a_target_the_tree_cannot_hold_is_quarantined_and_the_run_goes_on(tmp_path, poison):
    path = friedman_csv(tmp_path / "friedman.csv", 3_000, poison)
    quarantine = tmp_path / "q.jsonl"
    summary = run_learn(LearnJob(sources=[str(path)], target="y",
                                 quarantine_path=str(quarantine),
                                 save_path=str(tmp_path / "m.model")))
    entries = [json.loads(line) for line in quarantine.read_text().splitlines()]
    assert [(e["line"], e["field"]) for e in entries] == [(POISON_ROW + 2, "y")]
    assert "finite" in entries[0]["reason"] or "range" in entries[0]["reason"]
    assert (summary["records"], summary["learned"]) == (3_000, 2_999)
    clean = run_learn(LearnJob(sources=[str(friedman_csv(tmp_path / "c.csv", 3_000, None))],
                               target="y"))
    # everything but the poisoned record learned: the error stays that of a sane tree
    assert summary["rmse"] < 2 * clean["rmse"]


def test_a_huge_feature_value_is_quarantined_too(tmp_path):
    path = friedman_csv(tmp_path / "f.csv", 2_000, None)
    lines = path.read_text().splitlines()
    fields = lines[100].split(",")
    fields[3] = "1e300"
    lines[100] = ",".join(fields)
    path.write_text("\n".join(lines) + "\n")
    quarantine = tmp_path / "q.jsonl"
    summary = run_learn(LearnJob(sources=[str(path)], target="y",
                                 quarantine_path=str(quarantine)))
    entry = json.loads(quarantine.read_text())
    assert (entry["line"], entry["field"], entry["value"]) == (101, "x3", "1e+300")
    assert summary["learned"] == 1_999


def test_a_checkpointed_run_with_a_poison_record_resumes_and_ends(tmp_path):
    path = friedman_csv(tmp_path / "friedman.csv", 3_000, 1e200)
    job = dict(sources=[str(path)], target="y", checkpoint_path=str(tmp_path / "ck"),
               checkpoint_every=500, batch_rows=500,
               quarantine_path=str(tmp_path / "q.jsonl"))
    first = run_learn(LearnJob(**job))
    again = run_learn(LearnJob(**job))   # starts from the checkpoint at the end
    assert first["learned"] == again["learned"] == 2_999
    assert len((tmp_path / "q.jsonl").read_text().splitlines()) == 1


SURROGATE_LINES = [
    '{"x": 1.0, "site": "north", "y": "ok"}',
    '{"x": 2.0, "site": "x\\ud800y", "y": "fault"}',      # a lone high surrogate
    '{"x": 3.0, "site": "\\udfff", "y": "ok"}',           # a lone low surrogate
    '{"x": 4.0, "site": "\\ud83d\\ude00", "y": "ok"}',    # a valid pair: one character
]


def test_lone_surrogates_from_json_lines_become_the_replacement_character(tmp_path):
    path = tmp_path / "s.jsonl"
    path.write_text("\n".join(SURROGATE_LINES) + "\n")
    for lines in (SURROGATE_LINES, SURROGATE_LINES + ["not json"]):  # fast and slow path
        path.write_text("\n".join(lines) + "\n")
        reader = JsonLinesReader(lambda: open(path, "rb"), str(path), 100)
        frame = next(reader.batches()).frame
        assert frame["site"].tolist() == ["north", "x\ufffdy", "\ufffd", "\U0001F600"]


def test_lone_surrogates_in_broker_messages_become_the_replacement_character():
    payloads = [line.encode() for line in SURROGATE_LINES]
    lines = np.arange(1, 5, dtype=np.int64)
    for extra in ([], [b"[1]"]):  # the one-array path, and message by message
        parsed = parse_payloads(payloads + extra, np.arange(1, 5 + len(extra)), "m",
                                None, "json")
        assert parsed.frame["site"].tolist() == ["north", "x\ufffdy", "\ufffd", "\U0001F600"]
    assert lines.size == 4


def test_a_run_over_lone_surrogates_saves_its_model_and_checkpoint(tmp_path):
    rows = [json.loads(SURROGATE_LINES[i % 4]) | {"x": float(i)} for i in range(400)]
    text = "\n".join(json.dumps(r) for r in rows)   # json.dumps writes \ud800 escapes
    assert "\\ud800" in text
    path = tmp_path / "s.jsonl"
    path.write_text(text + "\n")
    summary = run_learn(LearnJob(sources=[str(path)], target="y",
                                 save_path=str(tmp_path / "m.model"),
                                 checkpoint_path=str(tmp_path / "ck")))
    assert summary["outputs"]["model"] == str(tmp_path / "m.model")
    assert summary["checkpoint"]["written"] >= 1
    document = read_model_file(str(tmp_path / "m.model"))
    assert "x\ufffdy" in json.dumps(document, ensure_ascii=False, default=str)


def test_a_model_that_cannot_be_written_still_gives_the_summary(tmp_path, capsys):
    path = friedman_csv(tmp_path / "f.csv", 1_000, None)
    summary_path = tmp_path / "summary.json"
    job = LearnJob(sources=[str(path)], target="y", summary_path=str(summary_path),
                   save_path=str(tmp_path / "no" / "such" / "folder" / "m.model"))
    with pytest.raises(OutputError) as caught:
        run_learn(job)
    summary = json.loads(summary_path.read_text())
    assert summary["learned"] == 1_000 and summary["outputs"]["model"] is None
    assert "could not write the model" in summary["failures"][0]
    assert caught.value.summary["learned"] == 1_000
    with pytest.raises(SystemExit) as ended:
        main(["learn", str(path), "--target", "y", "--save", str(tmp_path / "no" / "m.model")])
    err = capsys.readouterr().err
    assert ended.value.code == EXIT_OUTPUT
    assert "learned 1,000 of 1,000 records" in err and "could not write the model" in err


def test_text_in_a_field_inferred_numeric_is_said_once_and_counted(tmp_path):
    # a field empty in the first 10,000 records (inferred numeric), labels later
    rows = ["x,code,y"] + [f"{i % 97 / 97},,{'hi' if i % 97 > 48 else 'lo'}"
                           for i in range(10_500)]
    rows += [f"{i % 97 / 97},A{i % 3},{'hi' if i % 97 > 48 else 'lo'}" for i in range(1_500)]
    path = tmp_path / "late.csv"
    path.write_text("\n".join(rows) + "\n")
    warnings: list[str] = []
    summary = LearnRun(LearnJob(sources=[str(path)], target="y",
                                quarantine_path=str(tmp_path / "q.jsonl")),
                       warn=warnings.append).run()
    assert summary["text_in_numbers"] == {"code": 1_500}
    assert len(warnings) == 1 and "line 10502: field 'code' holds 'A0'" in warnings[0]
    assert "--kind code=category" in warnings[0]


def agrawal_jsonl(path: Path, n: int, late_row: int) -> Path:
    """river's Agrawal records (Agrawal, Imielinski & Swami 1993) as JSON Lines; the
    record at ``late_row`` carries one key no earlier record has."""
    lines = []
    for i, (x, y) in enumerate(synth.Agrawal(classification_function=1, seed=9).take(n)):
        record = {**{k: float(v) for k, v in x.items()}, "y": "A" if y else "B"}
        if i == late_row:
            record["note"] = "checked"
        lines.append(json.dumps(record))
    path.write_text("\n".join(lines) + "\n")
    return path


def test_a_key_first_seen_after_inference_is_handled_alike_whatever_the_batch(tmp_path):
    path = agrawal_jsonl(tmp_path / "a.jsonl", 11_000, 10_500)
    results = []
    for rows in (65_536, 1_000, 333):
        warnings: list[str] = []
        predictions = tmp_path / f"p{rows}.csv"
        summary = LearnRun(LearnJob(sources=[str(path)], target="y", batch_rows=rows,
                                    quarantine_path=str(tmp_path / f"q{rows}.jsonl"),
                                    predictions_path=str(predictions)),
                           warn=warnings.append).run()
        assert summary["learned"] == 11_000 and summary["quarantined"] == 0
        assert summary["unknown_fields"] == {"note": 1}
        said = [w for w in warnings if "not in the schema" in w]
        assert len(said) == 1 and "--kind note=KIND" in said[0]
        results.append((summary["accuracy"], summary["schema"], predictions.read_text()))
    assert results[0] == results[1] == results[2]


def test_a_declared_key_absent_from_the_first_records_is_learned(tmp_path):
    path = agrawal_jsonl(tmp_path / "a.jsonl", 11_000, 10_500)
    for rows in (65_536, 1_000):
        summary = run_learn(LearnJob(sources=[str(path)], target="y", batch_rows=rows,
                                     declared={"note": "category"},
                                     quarantine_path=str(tmp_path / "q.jsonl")))
        assert {"name": "note", "kind": "category"} in summary["schema"]["fields"]
        assert summary["unknown_fields"] == {} and summary["learned"] == 11_000


def test_records_that_cannot_be_read_before_any_schema_are_quarantined(tmp_path):
    # RFC 8259 allows nested values; a record field must hold one value
    lines = ['{"y": {"a": 1}, "x": 1.0}', '{"y": "A", "x": [1]}']
    path = tmp_path / "nested.jsonl"
    path.write_text("\n".join(lines) + "\n")
    quarantine = tmp_path / "q.jsonl"
    warnings: list[str] = []
    summary = LearnRun(LearnJob(sources=[str(path)], target="y", batch_rows=1,
                                quarantine_path=str(quarantine),
                                save_path=str(tmp_path / "m.sap")),
                       warn=warnings.append).run()
    assert (summary["records"], summary["learned"], summary["quarantined"]) == (2, 0, 2)
    assert [json.loads(x)["line"] for x in quarantine.read_text().splitlines()] == [1, 2]
    assert any("no record could be learned" in w and "line 1, field 'y'" in w
               for w in warnings)
    assert not (tmp_path / "m.sap").exists()
    # readable records after them are learned, with the schema they give
    path.write_text("\n".join(lines + ['{"y": "A", "x": 2.0}', '{"y": "B", "x": 3.0}']) + "\n")
    quarantine.unlink()
    summary = run_learn(LearnJob(sources=[str(path)], target="y", batch_rows=1,
                                 quarantine_path=str(quarantine)))
    assert (summary["records"], summary["learned"], summary["quarantined"]) == (4, 2, 2)
