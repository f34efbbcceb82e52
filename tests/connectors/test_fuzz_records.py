"""Fuzz: arbitrary CSV and JSON Lines records never end a run with anything but a
message, and every record is accounted for (learned or quarantined).

Property tests (hypothesis, bounded to a few hundred small files so CI stays short).
The record syntax the generators stress is RFC 4180 (quoted fields, doubled quotes,
line breaks inside quotes, CRLF) and RFC 8259 (JSON values of every type, escapes).
"""

from __future__ import annotations

import json

from hypothesis import HealthCheck, given, settings, strategies as st

from stream.errors import SapwoodError
from stream.run.engine import run_learn
from stream.run.job import LearnJob

CELL = st.one_of(
    st.sampled_from(["", "NA", "nan", "inf", "-inf", "1e400", "1e200", "0", "-0.0", "TRUE",
                     "a,b", 'say "hi"', "line\nbreak", " 7 ", "\t", "é", "\ufeff1", "\x00"]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-10**20, 10**20).map(str),
    st.text(max_size=6),
)
FUZZ = settings(max_examples=60, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


def csv_cell(text: str) -> str:
    if any(ch in text for ch in ',"\r\n') or text != text.strip():
        return '"' + text.replace('"', '""') + '"'
    return text


def account(summary: dict) -> None:
    waiting = (summary.get("labels") or {}).get("waiting", 0)
    assert summary["records"] == summary["learned"] + summary["quarantined"] + waiting


def learn(tmp_path, name: str, body: bytes) -> None:
    path = tmp_path / name
    path.write_bytes(body)
    try:
        summary = run_learn(LearnJob(sources=[str(path)], target="y", batch_rows=7,
                                     quarantine_path=str(tmp_path / "q.jsonl")))
    except SapwoodError as exc:        # a message (bad schema, unreadable file), no crash
        assert str(exc)
        return
    account(summary)


ROW = st.lists(CELL, min_size=3, max_size=3)          # three fields, as most headers


@FUZZ
@given(rows=st.lists(ROW | ROW | ROW | st.lists(CELL, min_size=1, max_size=4), min_size=1,
                     max_size=25),
       crlf=st.booleans(),
       header=st.sampled_from(["x,z,y", "x,z,y", "x,z,y", "x,y,x2", "y", "x,y,y"]))
def test_csv_records(tmp_path_factory, rows, crlf, header):
    tmp_path = tmp_path_factory.mktemp("csv")
    end = "\r\n" if crlf else "\n"
    lines = [header] + [",".join(csv_cell(c) for c in row) for row in rows]
    learn(tmp_path, "f.csv", (end.join(lines) + end).encode("utf-8", "surrogatepass"))


JSON_VALUE = st.recursive(
    st.none() | st.booleans() | st.integers(-10**20, 10**20)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=6),
    lambda inner: st.lists(inner, max_size=2) | st.dictionaries(st.text(max_size=3), inner,
                                                                max_size=2),
    max_leaves=4)


LABEL = st.sampled_from(["a", "b", "é", None])


@FUZZ
@given(records=st.lists(st.fixed_dictionaries(
           {"y": LABEL | LABEL | LABEL | JSON_VALUE},
           optional={"x": st.floats(-1e3, 1e3) | st.floats(-1e3, 1e3) | JSON_VALUE,
                     "z": JSON_VALUE,
                     "w": st.integers(0, 5)}), min_size=1, max_size=25),
       junk=st.lists(st.sampled_from(["{", "[1,2]", "null", '"y"', "\\ud800", '{"y": "\\ud800"}',
                                      "{}", "   "]), max_size=3))
def test_json_lines_records(tmp_path_factory, records, junk):
    tmp_path = tmp_path_factory.mktemp("jsonl")
    lines = [json.dumps(r) for r in records] + junk
    learn(tmp_path, "f.jsonl", ("\n".join(lines) + "\n").encode("utf-8", "surrogatepass"))
