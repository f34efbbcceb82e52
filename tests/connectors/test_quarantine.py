"""Quarantine sink: rejects appended as JSON Lines (one object per line, jsonlines.org)."""

from __future__ import annotations

import json

import pytest

from connectors import QuarantineWriter, Reject
from stream.errors import ConfigError

BAD = [Reject("a.csv", 4, None, "4,5,6,7", "has 4 fields, expected 3"),
       Reject("a.csv", 9, "temp", "abc", "is not a number")]


def test_writes_one_json_object_per_reject_and_flushes_per_batch(tmp_path):
    path = tmp_path / "q.jsonl"
    with QuarantineWriter(str(path)) as quarantine:
        quarantine.write(BAD)
        # readable while the writer is still open: flushed at the end of the batch
        rows = [json.loads(line) for line in path.read_text().splitlines()]
        assert rows == [
            {"origin": "a.csv", "line": 4, "field": None, "value": "4,5,6,7",
             "reason": "has 4 fields, expected 3"},
            {"origin": "a.csv", "line": 9, "field": "temp", "value": "abc",
             "reason": "is not a number"},
        ]
        assert [Reject(**row) for row in rows] == BAD
        quarantine.write([])
        assert quarantine.count == 2


def test_appends_to_an_existing_file(tmp_path):
    path = tmp_path / "q.jsonl"
    for _ in range(2):
        with QuarantineWriter(str(path)) as quarantine:
            quarantine.write(BAD[:1])
    assert len(path.read_text().splitlines()) == 2


def test_none_only_counts():
    quarantine = QuarantineWriter(None)
    quarantine.write(BAD)
    quarantine.write(iter(BAD))
    assert quarantine.count == 4
    quarantine.close()
    quarantine.close()


def test_text_outside_ascii_is_kept(tmp_path):
    path = tmp_path / "q.jsonl"
    with QuarantineWriter(str(path)) as quarantine:
        quarantine.write([Reject("b.csv", 2, "ort", "Zürich\ufffd", "is not a number")])
    assert json.loads(path.read_text(encoding="utf-8"))["value"] == "Zürich\ufffd"


def test_unwritable_path_is_a_config_error(tmp_path):
    target = tmp_path / "missing" / "q.jsonl"
    with pytest.raises(ConfigError) as err:
        QuarantineWriter(str(target))
    assert str(err.value) == (f"cannot write quarantine file {str(target)!r}: "
                              "No such file or directory")
