"""The ``sapwood`` command (stream/cli.py): the contract other tools rely on.

What is checked, and against what:

* the summary keys, the exit codes (0 done, 1 bad usage or configuration, 2 input could
  not be read) and the exact error line on stderr where the message is sapwood's own
  (tests/README.md, "Contracts other tools rely on"; messages follow the house templates);
* bad records: the quarantine entries are compared with the defects written into the
  file by the test, line by line;
* standard input (``-``) gives what the same bytes give from a file;
* snapshots, ``sapwood rules`` on a directory, a snapshot file and a model, ``--format
  json`` and ``--top``.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993), written to CSV in
tmp_path; elevel, car and zipcode are nominal per river's Agrawal documentation and are
written as text labels. Defects are written into those records on purpose.

Exit codes are checked through ``stream.cli.main`` (which maps exceptions to codes) and,
where a real process matters (standard input, the process's own exit status), through
``python -m stream.cli`` in a subprocess.
"""

from __future__ import annotations

import csv
import itertools
import json
import subprocess
import sys
from pathlib import Path

import pytest
from river.datasets import synth

from stream.child_env import same_code_env
from stream.cli.main import main

AGRAWAL_KEYS = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue",
                "hyears", "loan")
NOMINAL_PREFIX = {"elevel": "e", "car": "car", "zipcode": "z"}  # nominal in river's docs
TARGET = "group"
HEADER = list(AGRAWAL_KEYS) + [TARGET]
TIMING_KEYS = {"seconds", "records_per_second", "startup_seconds"}


# ---------------------------------------------------------------- data and helpers

def agrawal_table(n: int, seed: int, function: int) -> list[list[str]]:
    """Rows of text (no header) from river's Agrawal generator."""
    rows = []
    for x, y in itertools.islice(synth.Agrawal(classification_function=function,
                                               seed=seed), n):
        row = [f"{NOMINAL_PREFIX[k]}{x[k]}" if k in NOMINAL_PREFIX else repr(float(x[k]))
               for k in AGRAWAL_KEYS]
        rows.append(row + [str(y)])
    return rows


def write_csv(path: Path, rows: list[list[str]]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(HEADER)
        writer.writerows(rows)
    return path


def run_main(args: list[str], capsys) -> tuple[int, str, str]:
    """Run ``sapwood ARGS`` in-process; returns (exit code, stdout, stderr)."""
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in args])
    out, err = capsys.readouterr()
    code = stop.value.code
    return (0 if code is None else code), out, err


def run_process(args: list[str], cwd: Path, stdin: bytes = b"") -> subprocess.CompletedProcess:
    """``python -m stream.cli ARGS`` as a real process running this checkout's code."""
    return subprocess.run([sys.executable, "-m", "stream.cli", *map(str, args)],
                          input=stdin, capture_output=True, cwd=cwd, env=same_code_env(),
                          timeout=300)


def last_line(text: str) -> str:
    return [line for line in text.splitlines() if line.strip()][-1]


def read_jsonl(path: Path) -> list[dict]:
    # blank lines are skipped here; tests/run/test_engine.py checks the files have none
    return [json.loads(line) for line in Path(path).read_text().splitlines() if line.strip()]


def comparable(summary: dict) -> dict:
    """A summary without wall-clock figures and without where its inputs and outputs were."""
    return {k: v for k, v in summary.items()
            if k not in TIMING_KEYS | {"sources", "outputs"}}


@pytest.fixture(scope="module")
def agrawal(tmp_path_factory) -> Path:
    """12,000 clean records, Agrawal function 2 (salary and age)."""
    return write_csv(tmp_path_factory.mktemp("data") / "agrawal.csv",
                     agrawal_table(12_000, seed=3, function=2))


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path, monkeypatch):
    # the default quarantine file is relative to the working directory
    monkeypatch.chdir(tmp_path)


# ---------------------------------------------------------------- the summary contract

CONTRACT_KEYS = ("records", "learned", "quarantined", "task", "accuracy", "kappa", "leaves",
                 "depth", "drift_alarms", "seconds", "records_per_second")


def test_learn_writes_a_summary_with_the_contract_keys(agrawal, tmp_path, capsys):
    # source: tests/README.md "Contracts other tools rely on" lists these keys
    summary_path = tmp_path / "run.json"
    code, out, err = run_main(["learn", agrawal, "--target", TARGET, "--summary",
                               summary_path], capsys)
    assert code == 0, err
    assert out == ""  # stdout carries only what was asked for
    summary = json.loads(summary_path.read_text())
    missing = [k for k in CONTRACT_KEYS if k not in summary]
    assert not missing, f"summary lacks {missing}"
    assert summary["records"] == summary["learned"] == 12_000
    assert summary["quarantined"] == 0
    assert summary["task"] == "classification"
    assert 0.5 < summary["accuracy"] <= 1.0
    assert -1.0 <= summary["kappa"] <= 1.0
    assert summary["leaves"] >= 2 and summary["depth"] >= 1
    assert isinstance(summary["drift_alarms"], int) and summary["drift_alarms"] >= 0
    assert summary["seconds"] > 0
    # records_per_second is records / seconds (seconds is rounded to 6 decimals)
    assert summary["records_per_second"] == pytest.approx(
        summary["records"] / summary["seconds"], rel=1e-4, abs=0.1)
    assert err.startswith("sapwood: learned 12,000 of 12,000 records in ")


def test_the_class_of_concern_figures_equal_scikit_learns_on_the_predictions(agrawal,
                                                                             tmp_path, capsys):
    """Declared or chosen, the summary's precision / recall / F1 of the class of concern
    are scikit-learn's on the run's own predictions (each made before learning the record)."""
    from sklearn.metrics import precision_recall_fscore_support

    truth = [row[-1] for row in csv.reader(agrawal.open())][1:]
    for extra in ([], ["--concern", "0"]):
        summary_path, predictions = tmp_path / "run.json", tmp_path / "p.csv"
        code, _, err = run_main(["learn", agrawal, "--target", TARGET, "--summary",
                                 summary_path, "--predictions", predictions, *extra], capsys)
        assert code == 0, err
        summary = json.loads(summary_path.read_text())
        counts = {label: truth[:1000].count(label) for label in set(truth[:1000])}
        concern = extra[1] if extra else min(counts, key=lambda k: (counts[k], k))
        assert summary["concern"] == concern
        predicted = [row["predicted"] for row in csv.DictReader(predictions.open())]
        p, r, f, _ = precision_recall_fscore_support(truth, predicted, labels=[concern])
        assert (summary["concern_precision"], summary["concern_recall"],
                summary["concern_f1"]) == pytest.approx((p[0], r[0], f[0]), abs=1e-12)
        assert f"class of concern {concern}: precision {100 * p[0]:.1f}%" in err


def test_learn_help_lists_the_tree_settings(capsys):
    code, out, _ = run_main(["learn", "--help"], capsys)
    assert code == 0
    for option in ("--target", "--summary", "--grace-period", "--delta", "--tie-threshold",
                   "--leaf-model", "--strict", "--quarantine", "--batch-rows"):
        assert option in out


# ---------------------------------------------------------------- exit codes

# (arguments after the source, exit code, exact last stderr line or None for click's own)
USAGE_ERRORS = {
    "unknown option": (["--target", TARGET, "--bogus"], 1, None),
    "grace period 0": (["--target", TARGET, "--grace-period", "0"], 1,
                       "sapwood: grace period must be a whole number >= 1, got 0"),
    "delta out of range": (["--target", TARGET, "--delta", "2"], 1,
                           "sapwood: delta must be a number in (0, 1), got 2.0"),
    "metrics interval 0": (["--target", TARGET, "--metrics-every", "0"], 1,
                           "sapwood: metrics interval must be a whole number >= 1, got 0"),
    "target not a field": (["--target", "fault"], 1,
                           "sapwood: target 'fault' is not a field; fields are: "
                           + ", ".join(HEADER)),
    "bad --kind": (["--target", TARGET, "--kind", "car"], 1,
                   "sapwood: --kind takes FIELD=KIND with KIND one of numeric, category, id, "
                   "time, ignore, got 'car'"),
    "not an integer": (["--target", TARGET, "--grace-period", "many"], 1, None),
    "class of concern of a number": (
        ["--target", "salary", "--concern", "fault"], 1,
        "sapwood: --concern for a numeric target must be 'high' or 'low' (the rules to show "
        "first), got 'fault'"),
    "no target": ([], 1, None),
}


@pytest.mark.parametrize("case", sorted(USAGE_ERRORS))
def test_bad_usage_and_configuration_exit_1(case, agrawal, tmp_path, capsys):
    extra, expected_code, expected_line = USAGE_ERRORS[case]
    summary = tmp_path / "run.json"
    code, out, err = run_main(["learn", agrawal, *extra, "--summary", summary], capsys)
    assert code == expected_code, err
    assert out == ""
    if expected_line is not None:
        assert last_line(err) == expected_line
    else:  # click's own message; it names the offending option
        assert "Error:" in err
    assert not summary.exists()


def test_unknown_option_names_the_option(agrawal, capsys):
    code, _, err = run_main(["learn", agrawal, "--target", TARGET, "--bogus"], capsys)
    assert code == 1
    assert "No such option" in err and "--bogus" in err


def test_missing_input_exits_2_naming_the_file(tmp_path, capsys):
    code, _, err = run_main(["learn", "missing.csv", "--target", TARGET], capsys)
    assert code == 2
    assert last_line(err) == "sapwood: cannot read 'missing.csv': No such file or directory"


def test_unknown_file_format_exits_1(tmp_path, capsys):
    (tmp_path / "data.txt").write_text("a,b\n1,2\n")
    code, _, err = run_main(["learn", "data.txt", "--target", "b"], capsys)
    assert code == 1
    assert last_line(err) == ("sapwood: cannot tell the format of 'data.txt' from its name; "
                              "give one of csv, jsonl, parquet, tsv")


def test_rules_top_must_be_positive(agrawal, tmp_path, capsys):
    model = tmp_path / "m.sapwood"
    assert run_main(["learn", agrawal, "--target", TARGET, "--save", model, "-q"],
                    capsys)[0] == 0
    code, out, err = run_main(["rules", model, "--top", "0"], capsys)
    assert code == 1 and out == ""
    assert last_line(err) == "sapwood: --top must be a whole number >= 1, got 0"


def test_a_real_process_ends_with_the_documented_exit_code(tmp_path):
    # the console entry point must turn the mapping into the process's exit status
    missing = run_process(["learn", "missing.csv", "--target", TARGET], tmp_path)
    assert missing.returncode == 2
    assert last_line(missing.stderr.decode()) == (
        "sapwood: cannot read 'missing.csv': No such file or directory")


# ---------------------------------------------------------------- standard input

def test_stdin_gives_what_the_file_gives(agrawal, tmp_path, capsys):
    from_file = tmp_path / "file.json"
    assert run_main(["learn", agrawal, "--target", TARGET, "--summary", from_file, "-q"],
                    capsys)[0] == 0
    piped = run_process(["learn", "-", "--target", TARGET, "--summary", "stdin.json", "-q"],
                        tmp_path, stdin=agrawal.read_bytes())
    assert piped.returncode == 0, piped.stderr.decode()
    a = json.loads(from_file.read_text())
    b = json.loads((tmp_path / "stdin.json").read_text())
    assert comparable(a) == comparable(b)
    assert b["sources"] == ["-"]


def test_stdin_json_lines_are_recognised_and_learned_alike(agrawal, tmp_path, capsys):
    # the same records as JSON objects: numbers as JSON numbers, labels as text
    with open(agrawal, newline="") as handle:
        records = list(csv.DictReader(handle))
    lines = []
    for record in records:
        obj = {k: (v if k in NOMINAL_PREFIX or k == TARGET else float(v))
               for k, v in record.items()}
        lines.append(json.dumps(obj))
    piped = run_process(["learn", "-", "--target", TARGET, "--summary", "jl.json", "-q"],
                        tmp_path, stdin=("\n".join(lines) + "\n").encode())
    assert piped.returncode == 0, piped.stderr.decode()
    from_file = tmp_path / "file.json"
    assert run_main(["learn", agrawal, "--target", TARGET, "--summary", from_file, "-q"],
                    capsys)[0] == 0
    a = json.loads(from_file.read_text())
    b = json.loads((tmp_path / "jl.json").read_text())
    assert (b["records"], b["accuracy"], b["kappa"], b["leaves"]) == \
        (a["records"], a["accuracy"], a["kappa"], a["leaves"])


def test_empty_stdin_gives_a_defined_summary(tmp_path):
    piped = run_process(["learn", "-", "--target", TARGET, "--summary", "empty.json"],
                        tmp_path, stdin=b"")
    assert piped.returncode == 0, piped.stderr.decode()
    summary = json.loads((tmp_path / "empty.json").read_text())
    assert (summary["records"], summary["learned"], summary["quarantined"]) == (0, 0, 0)
    assert summary["accuracy"] is None and summary["leaves"] == 0


def test_header_only_file_gives_a_defined_summary(tmp_path, capsys):
    data = write_csv(tmp_path / "header.csv", [])
    code, _, err = run_main(["learn", data, "--target", TARGET, "--summary", "e.json"], capsys)
    assert code == 0, err
    summary = json.loads((tmp_path / "e.json").read_text())
    assert (summary["records"], summary["learned"], summary["quarantined"]) == (0, 0, 0)
    assert summary["accuracy"] is None and summary["kappa"] is None


# ---------------------------------------------------------------- bad records

def _defective(tmp_path: Path) -> tuple[Path, list[list[str]], dict]:
    """3,000 Agrawal records with defects written at known lines (line = index + 2)."""
    rows = agrawal_table(3_000, seed=5, function=2)
    s, loan, t = HEADER.index("salary"), HEADER.index("loan"), HEADER.index(TARGET)
    rows[8] = rows[8][:-1]                       # line 10: one field short
    rows[18] = rows[18] + ["7"]                  # line 20: one field too many
    rows[28][s] = "abc"                          # line 30: not a number
    rows[38][s], rows[38][loan] = "x1", "y2"     # line 40: two bad fields, one record
    rows[48][t] = ""                             # line 50: no target
    rows[58][t] = "NA"                           # line 60: target is a missing marker
    path = write_csv(tmp_path / "defects.csv", rows)
    raw = {i: ",".join(rows[i]) for i in (8, 18)}
    expected = [
        {"origin": str(path), "line": 10, "field": None, "value": raw[8],
         "reason": "has 9 fields, expected 10"},
        {"origin": str(path), "line": 20, "field": None, "value": raw[18],
         "reason": "has 11 fields, expected 10"},
        {"origin": str(path), "line": 30, "field": "salary", "value": "abc",
         "reason": "is not a number"},
        {"origin": str(path), "line": 40, "field": "salary", "value": "x1",
         "reason": "is not a number"},
        {"origin": str(path), "line": 40, "field": "loan", "value": "y2",
         "reason": "is not a number"},
        {"origin": str(path), "line": 50, "field": TARGET, "value": None,
         "reason": "has no target value"},
        {"origin": str(path), "line": 60, "field": TARGET, "value": None,
         "reason": "has no target value"},
    ]
    return path, rows, {"entries": expected, "lines": {10, 20, 30, 40, 50, 60}}


def _by_line(entry: dict) -> tuple:
    return entry["line"], entry["field"] or ""


# A single "abc" in the prefix would make salary a category (inference: numeric only if
# every present value reads as a number), so the numeric kinds are declared, as a user
# with a dirty feed would.
NUMERIC_KINDS = ["--kind", "salary=numeric", "--kind", "loan=numeric"]


def test_bad_records_go_to_quarantine_and_the_run_goes_on(tmp_path, capsys):
    data, rows, expected = _defective(tmp_path)
    code, _, err = run_main(["learn", data, "--target", TARGET, *NUMERIC_KINDS,
                             "--summary", "run.json", "--quarantine", "q.jsonl",
                             "--predictions", "p.jsonl"], capsys)
    assert code == 0, err
    entries = read_jsonl(tmp_path / "q.jsonl")
    # order within a batch is the reader's rejects, then the encoder's: compare as sets
    assert sorted(entries, key=_by_line) == sorted(expected["entries"], key=_by_line)
    summary = json.loads((tmp_path / "run.json").read_text())
    assert summary["records"] == 3_000
    assert summary["quarantined"] == 6          # line 40 has two entries, one record
    assert summary["learned"] == 3_000 - 6
    assert summary["records"] == summary["learned"] + summary["quarantined"]
    assert summary["outputs"]["quarantine"] == "q.jsonl"
    predicted_lines = [p["line"] for p in read_jsonl(tmp_path / "p.jsonl")]
    assert predicted_lines == [i + 2 for i in range(3_000) if i + 2 not in expected["lines"]]
    assert "6 records quarantined in q.jsonl" in err


def test_default_quarantine_file_is_created_only_when_needed(agrawal, tmp_path, capsys):
    assert run_main(["learn", agrawal, "--target", TARGET, "-q"], capsys)[0] == 0
    assert not (tmp_path / "sapwood-quarantine.jsonl").exists()
    data, _, _ = _defective(tmp_path)
    assert run_main(["learn", data, "--target", TARGET, *NUMERIC_KINDS, "-q"], capsys)[0] == 0
    assert len(read_jsonl(tmp_path / "sapwood-quarantine.jsonl")) == 7


def test_strict_stops_at_a_bad_value_naming_file_line_field_and_value(tmp_path, capsys):
    rows = agrawal_table(2_000, seed=5, function=2)
    rows[28][HEADER.index("salary")] = "abc"
    data = write_csv(tmp_path / "one-bad.csv", rows)
    code, _, err = run_main(["learn", data, "--target", TARGET, *NUMERIC_KINDS, "--strict",
                             "--summary", "run.json"], capsys)
    assert code == 2
    assert last_line(err) == (f"sapwood: {data} line 30, field 'salary': 'abc' is not a "
                              "number (strict mode stops here)")
    assert not (tmp_path / "run.json").exists()


def test_strict_stops_at_a_record_with_the_wrong_field_count(tmp_path, capsys):
    rows = agrawal_table(2_000, seed=5, function=2)
    rows[8] = rows[8][:-1]
    data = write_csv(tmp_path / "short.csv", rows)
    code, _, err = run_main(["learn", data, "--target", TARGET, "--strict"], capsys)
    assert code == 2
    assert last_line(err) == (f"sapwood: {data} line 10: {','.join(rows[8])!r} has 9 fields, "
                              "expected 10 (strict mode stops here)")


def test_strict_names_the_first_bad_record_of_the_stream(tmp_path, capsys):
    # README: "--strict stops at the first one instead"
    rows = agrawal_table(3_000, seed=5, function=2)
    rows[28][HEADER.index("salary")] = "abc"     # line 30, the first defect
    rows[38] = rows[38][:-1]                     # line 40, a short record
    data = write_csv(tmp_path / "two-bad.csv", rows)
    code, _, err = run_main(["learn", data, "--target", TARGET, *NUMERIC_KINDS, "--strict"],
                            capsys)
    assert code == 2
    assert f"{data} line 30, field 'salary': 'abc'" in last_line(err)


def test_closing_report_names_the_window_it_measured(agrawal, capsys):
    code, _, err = run_main(["learn", agrawal, "--target", TARGET, "--window", "500"],
                            capsys)
    assert code == 0
    assert "last 500 records" in err


# ---------------------------------------------------------------- predictions on stdout

def test_predictions_to_stdout_one_line_per_learned_record(agrawal, capsys):
    code, out, _ = run_main(["learn", agrawal, "--target", TARGET, "--predictions", "-",
                             "-q"], capsys)
    assert code == 0
    rows = [json.loads(line) for line in out.splitlines() if line.strip()]
    assert [r["line"] for r in rows] == list(range(2, 12_002))
    assert set(rows[0]) == {"origin", "line", "predicted", "confidence", "rule"}
    assert rows[0]["predicted"] == ""  # nothing learned before the first record


# ---------------------------------------------------------------- snapshots and rules

@pytest.fixture(scope="module")
def learned(agrawal, tmp_path_factory):
    """One run with snapshots every 3,000 records and a saved model."""
    out = tmp_path_factory.mktemp("learned")
    with pytest.raises(SystemExit) as stop:
        main(["learn", str(agrawal), "--target", TARGET, "--snapshots", str(out / "snaps"),
              "--snapshot-every", "3000", "--save", str(out / "model.sapwood"),
              "--summary", str(out / "run.json"), "-q"])
    assert stop.value.code == 0
    return out


def test_snapshots_are_listed_in_the_index_at_each_interval(learned):
    index = json.loads((learned / "snaps" / "index.json").read_text())
    entries = index["snapshots"]
    assert [e["records"] for e in entries] == [3_000, 6_000, 9_000, 12_000]
    assert [e["sequence"] for e in entries] == [1, 2, 3, 4]
    for entry in entries:
        payload = json.loads((learned / "snaps" / entry["json"]).read_text())
        assert payload["records"] == entry["records"]
        assert payload["metrics"]["records"] == entry["records"]
        assert (learned / "snaps" / entry["text"]).read_text().startswith(
            "sapwood rules for group\n")
        assert payload["rules"], "a snapshot holds rules"
        for rule in payload["rules"]:
            for c in rule["conditions"]:  # feature/operator/value triples
                assert c["op"] in ("<=", ">", "in", "not in")
                assert c["feature"] in AGRAWAL_KEYS
                assert isinstance(c["missing"], bool)


def _header_free(text: str) -> list[str]:
    """Rule text without its second line (which carries the writing time, if any)."""
    lines = text.splitlines()
    return lines[:1] + lines[2:]


def test_rules_of_directory_snapshot_file_and_model_agree(learned, capsys):
    snaps, model = learned / "snaps", learned / "model.sapwood"
    texts, payloads = {}, {}
    for name, path in {"dir": snaps, "file": snaps / "snapshot-000004.json",
                       "model": model}.items():
        code, out, err = run_main(["rules", path], capsys)
        assert code == 0, err
        texts[name] = out
        code, out, err = run_main(["rules", path, "--form", "json"], capsys)
        assert code == 0, err
        payloads[name] = json.loads(out)
    assert texts["dir"] == texts["file"]
    assert _header_free(texts["dir"]) == _header_free(texts["model"])
    assert texts["model"].splitlines()[1].startswith("12,000 records learned | ")
    assert payloads["dir"]["rules"] == payloads["file"]["rules"] == payloads["model"]["rules"]
    assert payloads["model"]["records"] == 12_000
    summary = json.loads((learned / "run.json").read_text())
    assert payloads["model"]["rule_count"] == summary["leaves"]


def test_an_earlier_snapshot_equals_a_model_learned_on_that_prefix(agrawal, learned,
                                                                   tmp_path, capsys):
    with open(agrawal, newline="") as handle:
        prefix = list(csv.reader(handle))[1:6_001]
    head = write_csv(tmp_path / "head.csv", prefix)
    model = tmp_path / "head.sapwood"
    assert run_main(["learn", head, "--target", TARGET, "--save", model, "-q"], capsys)[0] == 0
    _, from_model, _ = run_main(["rules", model, "--form", "json"], capsys)
    _, from_snapshot, _ = run_main(["rules", learned / "snaps" / "snapshot-000002.json",
                                    "--form", "json"], capsys)
    a, b = json.loads(from_model), json.loads(from_snapshot)
    assert a["records"] == b["records"] == 6_000
    assert a["rules"] == b["rules"]


def test_json_rules_round_trip(learned, tmp_path, capsys):
    model = learned / "model.sapwood"
    _, first, _ = run_main(["rules", model, "--form", "json"], capsys)
    (tmp_path / "rules.json").write_text(first)
    code, second, err = run_main(["rules", tmp_path / "rules.json", "--form", "json"],
                                 capsys)
    assert code == 0, err
    assert json.loads(second) == json.loads(first)
    _, text_from_json, _ = run_main(["rules", tmp_path / "rules.json"], capsys)
    _, text_from_model, _ = run_main(["rules", model], capsys)
    assert text_from_json == text_from_model


def test_top_keeps_the_class_of_concern_then_the_rules_covering_the_most(learned, capsys):
    model = learned / "model.sapwood"
    _, everything, _ = run_main(["rules", model, "--form", "json"], capsys)
    listing = json.loads(everything)
    rules, concern = listing["rules"], listing["concern"]
    # the run chose the rarer class among its first 1,000 labels
    assert concern in listing["classes"]
    leading = [r for r in rules if r["predict"] == concern]
    assert 1 <= len(leading) and len(rules) > len(leading) + 1
    n = len(leading) + 1
    code, top, _ = run_main(["rules", model, "--form", "json", "--top", str(n)], capsys)
    assert code == 0
    shown = json.loads(top)
    widest_other = max((r for r in rules if r["predict"] != concern),
                       key=lambda r: r["coverage"])
    assert [r["id"] for r in shown["rules"]] == [r["id"] for r in leading] + \
        [widest_other["id"]]
    assert shown["rule_count"] == shown["shown"] == n
    # the listing leads with the concern's rules, most of the class caught first
    caught = [r["class_counts"].get(concern, 0) for r in leading]
    assert caught == sorted(caught, reverse=True)
    assert rules[:len(leading)] == leading
    _, text, _ = run_main(["rules", model, "--top", "1", "--concern", widest_other["predict"]],
                          capsys)
    assert "1 rules shown (the class of concern's first" in text.splitlines()[1]
    assert f"class of concern: group = {widest_other['predict']}" in text
    assert sum(1 for line in text.splitlines() if " IF " in line) == 1


def test_rules_of_a_missing_path_exit_2(tmp_path, capsys):
    code, _, err = run_main(["rules", tmp_path / "nothing.sapwood"], capsys)
    assert code == 2
    assert f"{str(tmp_path / 'nothing.sapwood')!r}" in last_line(err)


def test_snapshots_of_a_stream_shorter_than_the_interval(tmp_path, capsys):
    # the README's first example; --snapshot-every defaults to 10,000 with --snapshots
    data = write_csv(tmp_path / "short.csv", agrawal_table(2_000, seed=3, function=2))
    code, _, err = run_main(["learn", data, "--target", TARGET, "--snapshots", "rules",
                             "--summary", "run.json", "--save", "m.sapwood"], capsys)
    assert code == 0, err
    index = json.loads((tmp_path / "rules" / "index.json").read_text())
    assert [e["records"] for e in index["snapshots"]] == [2_000]
    assert (tmp_path / "m.sapwood").exists()


# ---------------------------------------------------------------- schema

def test_schema_printed_then_declared_gives_the_inferred_run(agrawal, tmp_path, capsys):
    code, out, _ = run_main(["schema", agrawal, "--target", TARGET], capsys)
    assert code == 0
    schema = json.loads(out)
    kinds = {f["name"]: f["kind"] for f in schema["fields"]}
    assert kinds == {**{k: "numeric" for k in AGRAWAL_KEYS},
                     **{k: "category" for k in NOMINAL_PREFIX}, TARGET: "target"}
    (tmp_path / "schema.json").write_text(out)
    run_main(["learn", agrawal, "--target", TARGET, "--summary", "a.json", "-q"], capsys)
    code, _, err = run_main(["learn", agrawal, "--target", TARGET, "--schema", "schema.json",
                             "--summary", "b.json", "-q"], capsys)
    assert code == 0, err
    a = json.loads((tmp_path / "a.json").read_text())
    b = json.loads((tmp_path / "b.json").read_text())
    assert comparable(a) == comparable(b)


# ---------------------------------------------------------------- the demo runner

def test_demo_runner_smoke(tmp_path):
    # invented data, used here only to check that the demo runs and says where things went
    demo = Path(__file__).resolve().parents[2] / "demo" / "run.py"
    out = tmp_path / "demo"
    done = subprocess.run([sys.executable, str(demo), "--rows", "5000", "--out", str(out)],
                          capture_output=True, text=True, cwd=tmp_path, env=same_code_env(),
                          timeout=600)
    assert done.returncode == 0, done.stderr
    announced = done.stdout.split("Where things went:", 1)[1].splitlines()
    places = {}
    for line in announced:
        parts = [p for p in line.strip().split("  ") if p.strip()]
        if line.startswith("  ") and len(parts) >= 2:
            places[parts[0].strip()] = Path(parts[1].strip())
    assert set(places) == {"data", "summary", "metrics log", "snapshots", "drift events",
                           "saved model", "report", "alerts", "energy model"}
    for label, path in places.items():
        assert path.exists(), f"{label}: {path} was announced but does not exist"
    index = json.loads((places["snapshots"] / "index.json").read_text())["snapshots"]
    assert f"({len(index)} snapshots; index.json lists them)" in done.stdout
    summary = json.loads(places["summary"].read_text())
    assert summary["records"] == 5_000


def test_thresholds_print_in_the_resolution_of_the_data(tmp_path, capsys):
    """river's Agrawal generator (function 5: age, salary and loan) gives whole-year ages and computed money values (salary,
    commission, house value, loan): the text forms cut a threshold on a whole-number
    field to whole numbers (selecting the same records), give a computed one four
    significant digits; --exact and the JSON keep the exact values."""
    import re

    from stream.resolution import FINE
    from stream.rules.thresholds import on_grid

    model = tmp_path / "m.sapwood"
    data = write_csv(tmp_path / "agrawal5.csv", agrawal_table(12_000, seed=3, function=5))
    code, _, err = run_main(["learn", data, "--target", TARGET, "--save", model], capsys)
    assert code == 0, err
    _, listing, _ = run_main(["rules", model, "--form", "json"], capsys)
    document = json.loads(listing)
    decimals = document["decimals"]
    assert decimals["age"] == 0 and decimals["salary"] == decimals["loan"] == FINE
    exact = {}
    for rule in document["rules"]:
        for c in rule["conditions"]:
            if c["op"] in ("<=", ">"):
                exact.setdefault(c["feature"], set()).add(c["value"])
    assert {decimals[f] for f in exact} == {0, FINE}  # both kinds of field were split on
    _, text, _ = run_main(["rules", model], capsys)
    _, full, _ = run_main(["rules", model, "--exact"], capsys)
    number = r"(-?\d+(?:\.\d+)?)"
    shown: dict[str, set] = {}
    for a, name, b in re.findall(rf"(?:{number} < )?([a-z]+) (?:<=|>) {number}", text):
        shown.setdefault(name, set()).update(float(v) for v in (a, b) if v)
    assert set(shown) == set(exact)
    for name, values in shown.items():
        if decimals[name] == 0:
            assert values == {float(on_grid(v, 0)) for v in exact[name]}
        else:
            for v in values:
                assert any(abs(v - e) <= 5e-4 * abs(e) for e in exact[name]), (name, v)
    printed = {float(v) for v in re.findall(number, " ".join(
        line for line in full.splitlines() if "IF" in line or "AND" in line))}
    assert set().union(*exact.values()) <= printed
