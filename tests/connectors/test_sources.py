"""open_sources: formats, standard input, several files in order, the exact error lines."""

from __future__ import annotations

import gzip
import io
import json
import os
import threading

import numpy as np
import pytest

from connectors import FORMATS, Source, open_sources
import connectors.sources as sources
from connectors.sources import format_of, sniff_format
from stream.errors import EXIT_INPUT, EXIT_USAGE, ConfigError, InputError, SchemaError


def collect(src):
    try:
        return [(b.origin, b.frame.values.tolist(), b.lines.tolist(),
                 [(r.line, r.reason) for r in b.rejects]) for b in src.batches()]
    finally:
        src.close()


@pytest.mark.parametrize("name, fmt", [
    ("a.csv", "csv"), ("A.CSV", "csv"), ("a.csv.gz", "csv"), ("a.tsv", "tsv"),
    ("a.tsv.gz", "tsv"), ("a.jsonl", "jsonl"), ("a.ndjson.gz", "jsonl"),
    ("dir.v2/a.jsonl", "jsonl"), ("a.txt", None), ("a.gz", None), ("csv", None),
])
def test_format_from_extension(name, fmt):
    assert format_of(name) == fmt


@pytest.mark.parametrize("head, fmt", [
    (b'{"a": 1}\n', "jsonl"), (b'\n  \n {"a": 1}', "jsonl"), (b"a\tb\n1\t2\n", "tsv"),
    (b"a,b\n1\t2\n", "csv"), (b"a,b\n", "csv"), (b"", "csv"), (b"\n\na\tb", "tsv"),
    (b'\xef\xbb\xbf{"a": 1}\n', "jsonl"),
])
def test_sniffing(head, fmt):
    assert sniff_format(head) == fmt


def test_registry_is_the_cli_choice_list():
    assert sorted(FORMATS) == ["csv", "jsonl", "parquet", "tsv"]
    assert all(hasattr(reader, "extensions") for reader in FORMATS.values())


def test_stdin_is_sniffed(tmp_path):
    csv_data = b"a,b\n1,2\n"
    assert collect(open_sources(["-"], stdin=io.BytesIO(csv_data))) == [
        ("-", [[1, 2]], [2], [])]
    tsv = collect(open_sources(["-"], stdin=io.BytesIO(b"a\tb\n1\t2\n")))
    assert tsv == [("-", [[1, 2]], [2], [])]
    jsonl = collect(open_sources(["-"], stdin=io.BytesIO(b'\n{"a": 1}\n{"a": 2}\n')))
    assert jsonl == [("-", [[1], [2]], [2, 3], [])]
    packed = gzip.compress(b'{"a": 1}\n\n{"a": 2}\n')  # gzip magic 1f 8b (RFC 1952)
    assert collect(open_sources(["-"], stdin=io.BytesIO(packed))) == [
        ("-", [[1], [2]], [1, 3], [])]


def test_stdin_with_a_format_and_empty_stdin():
    # told it is CSV, a first line starting with "{" is a CSV header
    assert collect(open_sources(["-"], fmt="csv", stdin=io.BytesIO(b"{x,y\n1,2\n"))) == [
        ("-", [[1, 2]], [2], [])]
    assert collect(open_sources(["-"], stdin=io.BytesIO(b""))) == []


def test_stdin_stream_is_left_open():
    stream = io.BytesIO(b"a\n1\n")
    collect(open_sources(["-"], stdin=stream))
    assert not stream.closed


def test_files_in_the_order_given_with_stdin_between(tmp_path):
    (tmp_path / "a.csv").write_bytes(b"x,y\n1,2\n")
    (tmp_path / "c.csv.gz").write_bytes(gzip.compress(b"x,y\n\n5,6\n"))
    (tmp_path / "empty.csv").write_bytes(b"")
    specs = [str(tmp_path / "a.csv"), str(tmp_path / "empty.csv"), "-",
             str(tmp_path / "c.csv.gz")]
    got = collect(open_sources(specs, stdin=io.BytesIO(b"x,y\n3,4\n")))
    assert got == [(specs[0], [[1, 2]], [2], []), ("-", [[3, 4]], [2], []),
                   (specs[3], [[5, 6]], [3], [])]


def test_jsonl_and_csv_mixed(tmp_path):
    (tmp_path / "a.jsonl").write_text(json.dumps({"y": 1, "x": 2}) + "\n")
    (tmp_path / "b.csv").write_text("x,y\n3,4\n")
    got = collect(open_sources([str(tmp_path / "a.jsonl"), str(tmp_path / "b.csv")]))
    assert [g[1] for g in got] == [[[1, 2]], [[3, 4]]]


def test_files_are_opened_one_after_the_other(tmp_path, monkeypatch):
    for name in "ab":
        (tmp_path / f"{name}.csv").write_text("x\n1\n")
    opened = []
    real = sources._open_file
    monkeypatch.setattr(sources, "_open_file", lambda p: opened.append(p) or real(p))
    batches = open_sources([str(tmp_path / "a.csv"), str(tmp_path / "b.csv")]).batches()
    assert opened == []
    next(batches)
    assert opened == [str(tmp_path / "a.csv")]
    next(batches)
    assert opened == [str(tmp_path / "a.csv"), str(tmp_path / "b.csv")]


def test_a_later_file_with_other_columns(tmp_path):
    (tmp_path / "a.csv").write_text("t,p,y\n1,2,3\n")
    (tmp_path / "b.csv").write_text("t,flow,y\n1,2,3\n")
    (tmp_path / "c.csv").write_text("t,p\n1,2\n")
    (tmp_path / "d.tsv").write_text("t\tp\ty\tz\n1\t2\t3\t4\n")
    a, b, c, d = (str(tmp_path / n) for n in ("a.csv", "b.csv", "c.csv", "d.tsv"))
    with pytest.raises(SchemaError) as err:
        collect(open_sources([a, b]))
    assert str(err.value) == (f"{b!r} does not have the columns of {a!r}: "
                              f"column 2 is 'flow' in {b!r} but 'p' in {a!r}")
    with pytest.raises(SchemaError) as err:
        collect(open_sources([a, c]))
    assert str(err.value) == (f"{c!r} does not have the columns of {a!r}: "
                              f"{c!r} has no column 3 ('y' in {a!r})")
    with pytest.raises(SchemaError) as err:
        collect(open_sources([a, d]))
    assert str(err.value).endswith(f"{d!r} has an extra column 4 ('z') that {a!r} lacks")


def test_missing_and_unreadable_inputs(tmp_path):
    missing = str(tmp_path / "x.csv")
    with pytest.raises(InputError) as err:
        open_sources([missing])
    assert str(err.value) == f"cannot read {missing!r}: No such file or directory"
    assert err.value.exit_code == EXIT_INPUT
    folder = tmp_path / "d.csv"
    folder.mkdir()
    with pytest.raises(InputError, match="Is a directory"):
        open_sources([str(folder)])


def test_corrupt_gzip_is_an_input_error(tmp_path):
    path = tmp_path / "x.csv.gz"
    path.write_bytes(gzip.compress(b"a,b\n" + b"1,2\n" * 1000)[:-30])  # cut short
    with pytest.raises(InputError) as err:
        collect(open_sources([str(path)]))
    assert str(err.value).startswith(f"cannot read {str(path)!r}: ")


@pytest.mark.parametrize("call, message", [
    (lambda: open_sources([]), "give at least one source (a file name, or - for standard "
                               "input)"),
    (lambda: open_sources(["x.csv"], fmt="xls"), "format must be one of csv, jsonl, parquet, tsv, "
                                                 "got 'xls'"),
    (lambda: open_sources(["-", "-"]), "standard input ('-') can be given only once"),
    (lambda: open_sources(["x.dat"]), "cannot tell the format of 'x.dat' from its name; "
                                      "give one of csv, jsonl, parquet, tsv"),
    (lambda: open_sources(["-"], batch_rows=0), "batch rows must be a whole number >= 1, "
                                                "got 0"),
])
def test_usage_errors(call, message):
    with pytest.raises(ConfigError) as err:
        call()
    assert str(err.value) == message and err.value.exit_code == EXIT_USAGE


def test_a_name_without_extension_reads_with_a_format(tmp_path):
    path = tmp_path / "feed"
    path.write_text("a\tb\n1\t2\n")
    assert collect(open_sources([str(path)], fmt="tsv"))[0][1] == [[1, 2]]


def test_source_protocol_and_close_twice(tmp_path):
    (tmp_path / "a.csv").write_text("x\n1\n2\n")
    src = open_sources([str(tmp_path / "a.csv")], batch_rows=1)
    assert isinstance(src, Source)
    batches = src.batches()
    next(batches)
    batches.close()
    src.close()
    src.close()


def test_live_stdin_batches_arrive_before_the_producer_stops():
    # A producer writes a few records and keeps the pipe open: they must come out now,
    # not when megabytes have piled up or the pipe closes.
    read_end, write_end = os.pipe()
    stdin = os.fdopen(read_end, "rb")
    writer = os.fdopen(write_end, "wb")
    writer.write(b"a,b\n1,2\n3,4\n")
    writer.flush()
    got = []
    done = threading.Event()

    def consume():
        for batch in open_sources(["-"], stdin=stdin).batches():
            got.append(batch.frame.values.tolist())
            done.set()

    thread = threading.Thread(target=consume, daemon=True)
    thread.start()
    try:
        assert done.wait(10), "no batch while the producer was still running"
        assert got[0] == [[1, 2], [3, 4]]
    finally:
        writer.write(b"5,6\n")
        writer.close()
        thread.join(10)
    assert np.concatenate(got).tolist() == [[1, 2], [3, 4], [5, 6]]
    stdin.close()


def test_live_stdin_quoted_line_break_across_a_pause():
    read_end, write_end = os.pipe()
    stdin = os.fdopen(read_end, "rb")
    writer = os.fdopen(write_end, "wb")
    writer.write(b'a,b\n"p\n')  # the record goes on in a later write
    writer.flush()
    got = []

    def consume():
        got.extend(collect(open_sources(["-"], stdin=stdin)))

    thread = threading.Thread(target=consume, daemon=True)
    thread.start()
    thread.join(0.3)
    writer.write(b'q",1\n')
    writer.close()
    thread.join(10)
    assert got == [("-", [["p\nq", 1]], [2], [])]
    stdin.close()


def test_only_a_pipe_on_stdin_is_live(tmp_path):
    # a redirected file is read in full blocks (and parsed on the thread pool)
    path = tmp_path / "in.csv"
    path.write_bytes(b"a,b\n" + b"1,2\n" * 500)
    with open(path, "rb") as stdin:
        assert not isinstance(sources._live(stdin), sources._LiveStdin)
        batches = list(open_sources(["-"], stdin=stdin, batch_rows=100).batches())
    assert [len(b) for b in batches] == [100] * 5
    assert not isinstance(sources._live(io.BytesIO()), sources._LiveStdin)
    read_end, write_end = os.pipe()
    with os.fdopen(read_end, "rb") as pipe, os.fdopen(write_end, "wb"):
        assert isinstance(sources._live(pipe), sources._LiveStdin)
