"""Odd files get the usual messages and exit codes (exit codes: stream/errors.py)."""

from __future__ import annotations

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
