"""CSV/TSV reader: values as pandas reads them, exact physical line numbers, bad rows kept out.

Outside references: pandas.read_csv (the reference parser, same file), Python's csv module
(writes RFC 4180 quoting), and river's bundled real datasets (shuttle, airline passengers).
"""

from __future__ import annotations

import csv
import gzip
import io
import os

import numpy as np
import pandas as pd
import pytest
import river
from hypothesis import given, settings
from hypothesis import strategies as st

from connectors import delimited
from connectors.delimited import MAX_TEXT_CHARS, CsvReader, TsvReader
from connectors.sources import open_sources
from stream.errors import InputError

RIVER_DATA = os.path.join(os.path.dirname(river.__file__), "datasets")


def read(data: bytes, reader=CsvReader, batch_rows: int = 65536, threads: int = 1):
    """All batches of ``data`` read with ``reader``."""
    src = reader(lambda: io.BytesIO(data), "t.csv", batch_rows=batch_rows, threads=threads)
    try:
        return list(src.batches())
    finally:
        src.close()


def joined(batches):
    frame = pd.concat([b.frame for b in batches], ignore_index=True) if batches else None
    lines = np.concatenate([b.lines for b in batches]) if batches else np.empty(0)
    rejects = [r for b in batches for r in b.rejects]
    return frame, lines.tolist(), rejects


def test_rejects_and_rows_keep_their_physical_lines_across_blank_lines():
    data = (b"a,b,c\n"            # 1 header
            b"1,2,3\n"            # 2
            b"\n"                 # 3 blank
            b"4,5,6,7\n"          # 4 too many fields
            b"   \n"              # 5 whitespace only: blank, as pandas skips it
            b"8,9\n"              # 6 too few fields
            b"10,11,12\n")        # 7
    frame, lines, rejects = joined(read(data))
    assert frame.values.tolist() == [[1, 2, 3], [10, 11, 12]]
    assert lines == [2, 7]
    assert [(r.line, r.field, r.value, r.reason) for r in rejects] == [
        (4, None, "4,5,6,7", "has 4 fields, expected 3"),
        (6, None, "8,9", "has 2 fields, expected 3"),
    ]
    assert rejects[0].message() == "t.csv line 4: '4,5,6,7' has 4 fields, expected 3"


def test_long_first_row_and_short_row_in_one_chunk():
    # pandas alone would take the first row's width and truncate it with a warning only;
    # the delimiter total (2 + 0) equals (3 - 1) x 2 rows, so only the first-row check
    # catches this
    frame, lines, rejects = joined(read(b"a,b\n1,2,3\n4\n5,6\n"))
    assert frame.values.tolist() == [[5, 6]] and lines == [4]
    assert [(r.line, r.reason) for r in rejects] == [
        (2, "has 3 fields, expected 2"), (3, "has 1 field, expected 2")]


def test_one_field_reads_singular():
    _, _, rejects = joined(read(b"a,b\n1,2\n7\n"))
    assert rejects[0].reason == "has 1 field, expected 2"


def test_quoted_newlines_count_as_physical_lines():
    # RFC 4180 section 2.6: a quoted field may hold line breaks; 2.7: "" is one quote.
    data = b'a,b\n"x\ny",1\n"say ""hi""",2\n3,4,5\n6,7\n'
    frame, lines, rejects = joined(read(data))
    assert frame["a"].tolist() == ["x\ny", 'say "hi"', "6"]
    assert lines == [2, 4, 6]
    assert [(r.line, r.reason) for r in rejects] == [(5, "has 3 fields, expected 2")]


def test_quote_inside_unquoted_field_is_literal_as_pandas_reads_it():
    data = b'a,b\nab"c,1\n"ab"c,2\n'
    frame, lines, _ = joined(read(data))
    reference = pd.read_csv(io.BytesIO(data))  # pandas is the reference parser here
    assert frame.values.tolist() == reference.values.tolist()
    assert lines == [2, 3]


def test_crlf_and_lone_cr_line_breaks():
    frame, lines, rejects = joined(read(b"a,b\r\n1,2\r\n\r\n3\r\n4,5\r\n"))
    assert frame.values.tolist() == [[1, 2], [4, 5]]
    assert lines == [2, 5]
    assert rejects[0].line == 4 and rejects[0].value == "3"
    # a lone CR ends a line, as pandas' C tokenizer treats it
    frame, lines, _ = joined(read(b"a,b\r1,2\r\r3,4\r"))
    assert frame.values.tolist() == [[1, 2], [3, 4]]
    assert lines == [2, 4]


def test_blank_lines_before_the_header_count():
    frame, lines, _ = joined(read(b"\n\na,b\n1,2\n"))
    assert list(frame.columns) == ["a", "b"] and lines == [4]


def test_byte_order_mark_is_dropped():
    frame, _, _ = joined(read(b"\xef\xbb\xbfa,b\n1,2\n"))
    assert list(frame.columns) == ["a", "b"]


def test_missing_markers_are_data_not_errors():
    # every default marker of pandas.read_csv (the reference) comes back missing
    markers = sorted(pd._libs.parsers.STR_NA_VALUES - {""})
    body = "".join(f"{m},{i}\n" for i, m in enumerate(markers)) + ",99\n"
    frame, lines, rejects = joined(read(("a,b\n" + body).encode()))
    assert rejects == []
    assert frame["a"].isna().all() and len(frame) == len(markers) + 1
    assert lines == list(range(2, len(markers) + 3))


def test_garbage_in_a_numeric_column_stays_text_for_the_encoder():
    frame, _, rejects = joined(read(b"a,b\n1.5,2\nabc,3\n"))
    assert rejects == [] and frame["a"].tolist() == ["1.5", "abc"]


def test_long_bad_record_text_is_cut():
    data = b"a,b\n" + b"x" * 500 + b",1,2\n"
    _, _, rejects = joined(read(data))
    assert len(rejects[0].value) == MAX_TEXT_CHARS


def test_unclosed_quote_rejects_its_first_line_and_reading_goes_on():
    data = b'a,b\n1,2\n"3,4\n5,6\n'
    frame, lines, rejects = joined(read(data))
    assert frame.values.tolist() == [[1, 2], [5, 6]]
    assert lines == [2, 4]
    assert [(r.line, r.value, r.reason) for r in rejects] == [
        (3, '"3,4', "has an unclosed quote")]


@pytest.mark.parametrize("data", [b"", b"\n\n  \n", b"a,b,c\n", b"a,b,c\n\n\n"])
def test_empty_input_or_header_only_gives_no_batches(data):
    assert read(data) == []


def test_header_columns_follow_pandas_naming():
    src = CsvReader(lambda: io.BytesIO(b'"x,y",b,,c,\n1,2,3,4,5\n'), "t.csv")
    reference = pd.read_csv(io.BytesIO(b'"x,y",b,,c,\n1,2,3,4,5\n'))
    assert src.columns == list(reference.columns) == ["x,y", "b", "Unnamed: 2", "c",
                                                      "Unnamed: 4"]


def test_tsv():
    frame, lines, rejects = joined(read(b"a\tb\n1\t2\n\n3\t4\t5\n6\t\n", reader=TsvReader))
    assert frame["a"].tolist() == [1, 6] and np.isnan(frame["b"].tolist()[1])
    assert lines == [2, 5] and rejects[0].line == 4


def test_batches_hold_at_most_batch_rows_records():
    rows = "".join(f"{i},{i * 2}\n" for i in range(1000))
    batches = read(("a,b\n" + rows).encode(), batch_rows=64)
    assert all(len(b) <= 64 for b in batches) and len(batches) >= 1000 // 64
    frame, lines, _ = joined(batches)
    assert frame["a"].tolist() == list(range(1000)) and lines == list(range(2, 1002))


def test_parallel_parsing_keeps_stream_order():
    rng = np.random.default_rng(7)
    rows = "".join(f"{v:.4f},{i}\n" for i, v in enumerate(rng.normal(size=5000)))
    data = ("v,i\n" + rows + "1,2,3\n" + rows).encode()
    one = joined(read(data, batch_rows=300, threads=1))
    many = joined(read(data, batch_rows=300, threads=3))
    pd.testing.assert_frame_equal(one[0], many[0])
    assert one[1] == many[1] and one[2] == many[2]


def test_gzip_lines_as_in_the_plain_file(tmp_path):
    data = b"a,b\n1,2\n\n3\n4,5\n"
    (tmp_path / "x.csv").write_bytes(data)
    (tmp_path / "x.csv.gz").write_bytes(gzip.compress(data))
    plain = joined(list(open_sources([str(tmp_path / "x.csv")]).batches()))
    packed = joined(list(open_sources([str(tmp_path / "x.csv.gz")]).batches()))
    assert plain[1] == packed[1] == [2, 5]
    assert [r.line for r in plain[2]] == [r.line for r in packed[2]] == [4]


def test_river_shuttle_reads_as_pandas_reads_it():
    # river's bundled Shuttle dataset (gzip, CRLF line breaks), read by pandas as reference
    path = os.path.join(RIVER_DATA, "shuttle.csv.gz")
    batches = list(open_sources([path], batch_rows=8192).batches())
    frame, lines, rejects = joined(batches)
    reference = pd.read_csv(path)
    pd.testing.assert_frame_equal(frame, reference, check_dtype=False)
    assert rejects == [] and lines == list(range(2, len(reference) + 2))
    assert len(batches) > 1


def test_river_airline_passengers_quoted_crlf():
    # every field quoted, CRLF line breaks (RFC 4180 style): the exact path must agree
    path = os.path.join(RIVER_DATA, "airline-passengers.csv")
    frame, lines, rejects = joined(list(open_sources([path]).batches()))
    reference = pd.read_csv(path)
    pd.testing.assert_frame_equal(frame, reference)
    assert lines == list(range(2, len(reference) + 2)) and rejects == []


def test_a_line_beyond_the_record_limit_stops_the_run(monkeypatch):
    # the limit guards memory: it applies while no line break is found in what was read
    monkeypatch.setattr(delimited, "MAX_RECORD_BYTES", 1000)
    data = b"a,b\n1,2\n" + b"3," + b"x" * 2_000_000 + b"\n5,6\n"
    with pytest.raises(InputError) as err:
        read(data, batch_rows=10)  # small batches: blocks of a few KiB
    assert str(err.value) == "cannot read 't.csv': line 3 is longer than 1000 bytes"


def test_a_runaway_quote_is_cut_at_the_record_limit(monkeypatch):
    # the quote opened on line 3 never closes: without a limit the reader would hold
    # the whole rest of the stream looking for its end
    monkeypatch.setattr(delimited, "MAX_RECORD_BYTES", 1000)
    data = b'a,b\n1,2\n"3,4\n' + b"5,6\n" * 20_000
    frame, lines, rejects = joined(read(data, threads=2))
    assert [(r.line, r.reason) for r in rejects] == [(3, "has an unclosed quote")]
    assert lines == [2] + list(range(4, 20_004)) and len(frame) == 20_001


def test_header_with_unclosed_quote_is_an_input_error():
    with pytest.raises(InputError, match="the header on line 1 has an unclosed quote"):
        read(b'"a,b\n1,2\n')


# --- property: any batch size, any mix of blank and bad lines -------------------------

_cell = st.one_of(
    st.integers(-1000, 1000).map(str),
    st.sampled_from(["", "NA", "x y", 'say "hi"', "a,b", "two\nlines", " pad "]),
)


@settings(max_examples=60, deadline=None)
@given(rows=st.lists(st.tuples(_cell, _cell, _cell), min_size=0, max_size=40),
       extras=st.lists(st.sampled_from(["blank", "short", "long", "spaces"]), max_size=40),
       batch_rows=st.integers(1, 50), crlf=st.booleans())
def test_lines_match_a_file_written_by_the_csv_module(rows, extras, batch_rows, crlf):
    # Python's csv module writes RFC 4180 quoting; we track each record's physical line.
    newline = "\r\n" if crlf else "\n"
    out, expected_lines, expected_rejects = [], [], []
    line = 2
    for i, row in enumerate(rows):
        extra = extras[i] if i < len(extras) else None
        if extra == "blank":
            out.append(newline)
            line += 1
        elif extra == "spaces":
            out.append("  " + newline)
            line += 1
        elif extra in ("short", "long"):
            out.append(("1,2" if extra == "short" else "1,2,3,4") + newline)
            expected_rejects.append(line)
            line += 1
        buffer = io.StringIO()
        csv.writer(buffer, lineterminator=newline).writerow(row)
        text = buffer.getvalue()
        out.append(text)
        expected_lines.append(line)
        line += text.count("\n")
    data = ("a,b,c" + newline + "".join(out)).encode()
    frame, lines, rejects = joined(read(data, batch_rows=batch_rows))
    assert lines == expected_lines
    assert [r.line for r in rejects] == expected_rejects
    if rows:
        # values: as pandas reads the same records written without the noise
        reference = pd.read_csv(io.StringIO("a,b,c\n" + "".join(map(_row_text, rows))))
        assert _cells(frame) == _cells(reference)


def _row_text(row) -> str:
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerow(row)
    return buffer.getvalue()


def _cells(frame: pd.DataFrame) -> list[list[str]]:
    """Cells as text; numbers compared as numbers (a chunk may read a column as int)."""
    def norm(value) -> str:
        if isinstance(value, float) and np.isnan(value):
            return ""
        try:
            return repr(float(value))
        except (TypeError, ValueError):
            return str(value)
    return [[norm(v) for v in row] for row in frame.astype(object).values.tolist()]


def test_a_header_naming_a_column_twice_is_refused_with_both_positions(tmp_path):
    # pandas.read_csv renames a repeated name ("y" -> "y.1"), so a target named twice
    # would silently be the first column
    path = tmp_path / "twice.csv"
    path.write_text("y,x,y\n1,2,a\n3,4,b\n")
    reader = CsvReader(lambda: open(path, "rb"), str(path), 100)
    with pytest.raises(InputError, match=r"names a column more than once \('y' in "
                                         r"columns 1, 3\)"):
        list(reader.batches())


def test_header_names_given_by_the_user_tell_repeated_columns_apart(tmp_path):
    path = tmp_path / "twice.csv"
    path.write_text("y,x,y\n1,2,a\n3,4,b\n")
    reader = CsvReader(lambda: open(path, "rb"), str(path), 100, names=["y_old", "x", "y"])
    (batch,) = list(reader.batches())
    assert list(batch.frame.columns) == ["y_old", "x", "y"]
    assert batch.frame["y"].tolist() == ["a", "b"] and batch.lines.tolist() == [2, 3]
    short = CsvReader(lambda: open(path, "rb"), str(path), 100, names=["a", "b"])
    with pytest.raises(InputError, match="--header gives 2 names but the header on line 1 "
                                         "has 3 fields"):
        list(short.batches())


def test_the_run_learns_the_column_the_user_names(tmp_path):
    from stream.errors import ConfigError
    from stream.run.engine import run_learn
    from stream.run.job import LearnJob

    path = tmp_path / "twice.csv"
    path.write_text("y,x,y\n" + "".join(f"{i % 2},{i / 10},{'ab'[i % 3 == 0]}\n"
                                         for i in range(30)))
    summary = run_learn(LearnJob(sources=[str(path)], target="y",
                                 header=["y_old", "x", "y"],
                                 quarantine_path=str(tmp_path / "q.jsonl")))
    assert sorted(summary["classes"]) == ["a", "b"] and summary["learned"] == 30
    with pytest.raises(ConfigError, match="--header must name every column once"):
        run_learn(LearnJob(sources=[str(path)], target="y", header=["y", "x", "y"]))


def test_batches_grow_from_a_small_first_one_doubling_at_most():
    # the learner starts on a small first batch; the later ones grow, at most doubling,
    # so the parser keeps ahead; every line is read once, in order
    text = "a,b\n" + "".join(f"{i},{i % 7}\n" for i in range(300_000))
    reader = CsvReader(lambda: io.BytesIO(text.encode()), "grow.csv", batch_rows=65_536)
    sizes, firsts = [], []
    for batch in reader.batches():
        sizes.append(len(batch))
        firsts.append(int(batch.frame["a"].iloc[0]))
    assert sum(sizes) == 300_000 and firsts == [sum(sizes[:i]) for i in range(len(sizes))]
    assert sizes[0] <= delimited.FIRST_BATCH_ROWS and max(sizes) == 65_536
    assert all(later <= 2 * earlier for earlier, later in zip(sizes, sizes[1:-1]))
