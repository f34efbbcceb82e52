"""JSON Lines reader: one object per line (the JSON Lines convention, jsonlines.org).

Outside references: Python's json module (RFC 8259 parser; its error text and column
are what a reject reports) and pandas (frame construction from the same objects).
"""

from __future__ import annotations

import gzip
import io
import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from connectors.jsonlines import JsonLinesReader
from connectors.sources import open_sources


def read(data: bytes, batch_rows: int = 65536):
    src = JsonLinesReader(lambda: io.BytesIO(data), "t.jsonl", batch_rows=batch_rows)
    try:
        return list(src.batches())
    finally:
        src.close()


def joined(batches):
    frame = pd.concat([b.frame for b in batches], ignore_index=True) if batches else None
    lines = np.concatenate([b.lines for b in batches]).tolist() if batches else []
    return frame, lines, [r for b in batches for r in b.rejects]


def test_keys_may_differ_union_in_first_seen_order():
    data = b'{"b": 1, "a": "x"}\n{"c": true, "a": "y"}\n{"a": null}\n'
    frame, lines, rejects = joined(read(data))
    assert list(frame.columns) == ["b", "a", "c"]
    assert frame["b"].isna().tolist() == [False, True, True] and frame["b"][0] == 1
    assert frame["c"].isna().tolist() == [True, False, True] and frame["c"][1] is True
    assert frame["a"].isna().tolist() == [False, False, True]
    assert lines == [1, 2, 3] and rejects == []


def test_bad_lines_become_rejects_with_their_line():
    bad_json = '{"a": 1 "b": 2}'
    data = ('{"a": 1}\n'       # 1
            '\n'               # 2 blank
            f'{bad_json}\n'    # 3 not valid JSON
            '[1, 2]\n'         # 4 not an object
            '   \n'            # 5 whitespace only
            '{"a": [1, 2]}\n'  # 6 nested value
            '{"a": 2}\r\n'     # 7 CRLF is fine
            '"text"\n').encode()  # 8 not an object
    frame, lines, rejects = joined(read(data))
    assert frame["a"].tolist() == [1, 2] and lines == [1, 7]
    # the reason carries Python's json message and column for the same text
    try:
        json.loads(bad_json)
    except json.JSONDecodeError as exc:
        expected = f"is not valid JSON: {exc.msg} at column {exc.colno}"
    assert expected == "is not valid JSON: Expecting ',' delimiter at column 9"
    assert [(r.line, r.field, r.value, r.reason) for r in rejects] == [
        (3, None, bad_json, expected),
        (4, None, "[1, 2]", "is not a JSON object"),
        (6, "a", "[1, 2]", "is a nested value (list or object)"),
        (8, None, '"text"', "is not a JSON object"),
    ]


def test_invalid_utf8_is_a_reject():
    _, lines, rejects = joined(read(b'{"a": 1}\n{"a": "\xff"}\n'))
    assert lines == [1] and rejects[0].line == 2 and rejects[0].reason == "is not valid UTF-8"


def test_objects_split_across_lines_are_never_misaligned():
    # Joined into one array these three lines parse as three objects; each line alone
    # is not valid JSON, so each must be rejected rather than shifted onto another line.
    data = b'{"a": [1, {"b": 1}\n{"c": 2}]}\n{"x": 1}, {"y": 2}\n'
    frame, lines, rejects = joined(read(data))
    assert lines == [] and [r.line for r in rejects] == [1, 2, 3]


def test_braces_inside_strings_take_the_fast_path_correctly():
    data = b'{"a": "[x]", "b": "{y}"}\n{"a": "z", "b": "w"}\n'
    frame, lines, rejects = joined(read(data))
    assert frame.values.tolist() == [["[x]", "{y}"], ["z", "w"]] and rejects == []


def test_empty_objects_and_empty_input():
    frame, lines, _ = joined(read(b"{}\n{}\n"))
    assert len(frame) == 2 and lines == [1, 2]
    assert read(b"") == [] and read(b"\n \n") == []


def test_gzip_and_batches(tmp_path):
    rows = "".join(json.dumps({"i": i, "even": i % 2 == 0}) + "\n" for i in range(300))
    path = tmp_path / "x.jsonl.gz"
    path.write_bytes(gzip.compress(rows.encode()))
    batches = list(open_sources([str(path)], batch_rows=64).batches())
    assert all(len(b) <= 64 for b in batches) and len(batches) >= 300 // 64
    frame, lines, _ = joined(batches)
    assert frame["i"].tolist() == list(range(300)) and lines == list(range(1, 301))


def test_values_match_pandas_built_from_the_same_objects():
    objects = [{"t": 1.5, "s": "a", "b": True}, {"t": None, "s": "NA"}, {"s": "c", "n": 3}]
    data = "".join(json.dumps(o) + "\n" for o in objects).encode()
    frame, _, _ = joined(read(data))
    pd.testing.assert_frame_equal(frame, pd.DataFrame(objects))


_scalar = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                    st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=5))


@settings(max_examples=50, deadline=None)
@given(objects=st.lists(st.dictionaries(st.sampled_from("abcd"), _scalar, max_size=4),
                        max_size=30),
       noise=st.lists(st.sampled_from(["", "blank", "bad", "nested"]), max_size=30),
       batch_rows=st.integers(1, 40))
def test_any_batch_size_gives_the_same_rows_and_lines(objects, noise, batch_rows):
    out, expected_lines, expected_rejects, line = [], [], [], 1
    for i, obj in enumerate(objects):
        kind = noise[i] if i < len(noise) else ""
        if kind:
            out.append({"blank": "", "bad": "{nope", "nested": '{"a": {"b": 1}}'}[kind])
            if kind != "blank":
                expected_rejects.append(line)
            line += 1
        out.append(json.dumps(obj))
        expected_lines.append(line)
        line += 1
    data = ("\n".join(out) + "\n").encode()
    frame, lines, rejects = joined(read(data, batch_rows=batch_rows))
    assert lines == expected_lines
    assert [r.line for r in rejects] == expected_rejects
    if objects:
        expected = pd.DataFrame(objects)
        if expected.shape[1]:
            got = frame.reindex(columns=expected.columns)
            assert _cells(got) == _cells(expected)


def _cells(frame: pd.DataFrame) -> list[list[object]]:
    return [[None if (isinstance(v, float) and np.isnan(v)) or v is None else v
             for v in row] for row in frame.astype(object).values.tolist()]


@pytest.mark.parametrize("line", [b"1", b"null", b'"x"', b"[]"])
def test_every_non_object_json_value_is_refused(line):
    _, lines, rejects = joined(read(line + b"\n"))
    assert lines == [] and rejects[0].reason == "is not a JSON object"
