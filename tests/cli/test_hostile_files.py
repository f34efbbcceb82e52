"""Odd files get the usual messages and exit codes (exit codes: stream/errors.py)."""

from __future__ import annotations

import json

from .test_main import run_main


def test_an_empty_model_file_gets_the_same_words_from_every_command(tmp_path, capsys):
    empty = tmp_path / "empty.sap"
    empty.write_bytes(b"")
    data = tmp_path / "d.csv"
    data.write_text("a,b\n1,2\n")
    rules = run_main(["rules", empty], capsys)
    score = run_main(["score", empty, data], capsys)
    assert rules[0] == score[0] == 2
    assert "is truncated: the file is empty" in rules[2]
    assert "is truncated: the file is empty" in score[2]


def test_a_header_only_file_with_an_unknown_target_is_an_error(tmp_path, capsys):
    data = tmp_path / "header.csv"
    data.write_text("a,b\n")
    code, _, err = run_main(["learn", data, "--target", "nope", "--save",
                             tmp_path / "m.sap"], capsys)
    assert code == 1 and "target 'nope' is not a field; fields are: a, b" in err
    assert not (tmp_path / "m.sap").exists()
    code, _, err = run_main(["learn", data, "--target", "b"], capsys)
    assert code == 0 and "learned 0 of 0 records" in err


def test_a_truncated_gzip_keeps_what_was_learned_and_exits_2(tmp_path, capsys):
    # river's SEA generator (Street & Kim 2001) as plain records; gzip cut at 70%
    import gzip

    from river.datasets import synth

    lines = ["x0,x1,x2,y"] + [f"{x[0]:.4f},{x[1]:.4f},{x[2]:.4f},{int(y)}"
                             for x, y in synth.SEA(seed=4).take(300_000)]
    packed = gzip.compress(("\n".join(lines) + "\n").encode())
    data = tmp_path / "cut.csv.gz"
    data.write_bytes(packed[:len(packed) * 7 // 10])
    model, summary = tmp_path / "m.sap", tmp_path / "s.json"
    # what a read of the broken stretch decompressed is lost with it: small batches
    # (small reads) keep all but the last
    code, _, err = run_main(["learn", data, "--target", "y", "--save", model,
                             "--summary", summary, "--batch-rows", "5000"], capsys)
    assert code == 2 and "Compressed file ended before the end-of-stream marker" in err
    facts = json.loads(summary.read_text())
    assert facts["stopped"] == "input error" and 0 < facts["learned"] < 300_000
    assert model.exists() and f"learned {facts['learned']:,} of" in err


def test_random_bytes_read_as_csv_give_a_short_escaped_message(tmp_path, capsys):
    import random
    import re

    data = tmp_path / "noise.csv"
    data.write_bytes(random.Random(603).randbytes(3_000))
    code, _, err = run_main(["learn", data, "--target", "y"], capsys)
    assert code == 1 and "target 'y' is not a field; fields are: " in err
    assert len(err) < 600                      # was 3,000 bytes of raw header
    # ECMA-48: no C0 (but tab and newline) or C1 control reaches the terminal raw
    assert not re.search(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]", err)


def test_a_long_list_of_fields_is_cut():
    from stream.run.schema import not_a_field

    message = not_a_field("target", "y", [f"f{i}" for i in range(100)] + ["z" * 100])
    assert message.endswith("f29 and 71 more")
    assert "z" * 41 not in message
