"""Run files (``--config FILE``), ``--print-config``, the grouped help of ``sapwood learn``
and the old option names kept for a release.

Sources: TOML 1.0 (toml.io) for the file syntax, read with Python's ``tomllib``; the
house message templates (a key or value that cannot be used is named with the file it
came from); the exit codes of the contract in tests/README.md (1 bad usage or
configuration).
"""

from __future__ import annotations

import json
import tomllib

import pytest
from click.testing import CliRunner

from stream.cli.main import cli, main
from stream.errors import ConfigError
from stream.rules.text import CAUTION
from stream.run.job import LearnJob


def _csv(path, rows=300):
    lines = ["x,door,fault"]
    for i in range(rows):
        lines.append(f"{i % 17},{'open' if i % 3 else 'shut'},{'yes' if i % 17 > 12 else 'no'}")
    path.write_text("\n".join(lines) + "\n")
    return path


def run(args, capsys):
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in args])
    out, err = capsys.readouterr()
    return stop.value.code, out, err


def test_a_run_file_sets_options_and_the_command_line_overrides_it(tmp_path, capsys):
    data = _csv(tmp_path / "d.csv")
    (tmp_path / "run.toml").write_text(
        f'sources = ["{data}"]\ntarget = "fault"\ngrace-period = 50\n'
        f'kind = "door=category"\ndrift = "off"\nsummary = "{tmp_path / "s.json"}"\n')
    code, out, _ = run(["learn", "--config", tmp_path / "run.toml", "--grace-period", "70",
                        "--print-config"], capsys)
    assert code == 0
    shown = tomllib.loads(out)
    assert shown["grace-period"] == 70 and shown["target"] == "fault"
    assert shown["kind"] == ["door=category"] and shown["drift"] == "off"
    assert shown["sources"] == [str(data)]
    # the printed settings are themselves a run file that gives the same settings
    (tmp_path / "again.toml").write_text(out)
    _, again, _ = run(["learn", "--config", tmp_path / "again.toml", "--print-config"],
                      capsys)
    assert tomllib.loads(again) == shown
    code, _, err = run(["learn", "--config", tmp_path / "run.toml", "-q"], capsys)
    assert code == 0, err
    summary = json.loads((tmp_path / "s.json").read_text())
    assert summary["records"] == 300 and summary["detector"] == "off"


def test_an_unknown_key_is_an_error_naming_the_key_and_the_file(tmp_path, capsys):
    path = tmp_path / "run.toml"
    path.write_text('target = "fault"\ngrace_period = 50\n')
    code, _, err = run(["learn", "x.csv", "--config", path], capsys)
    assert code == 1
    assert err.startswith(f"sapwood: run file '{path}': unknown key 'grace_period'; "
                          f"known keys: ")
    assert "grace-period" in err


@pytest.mark.parametrize("text, message", [
    ("target = \n", "is not valid TOML"),
    ("target = [\"a\", \"b\"]\n", "key 'target' takes one value, got ['a', 'b']"),
    ("[tree]\ndelta = 1\n", "unknown key 'tree'"),
])
def test_a_bad_run_file_is_refused_with_the_file_named(tmp_path, capsys, text, message):
    path = tmp_path / "run.toml"
    path.write_text(text)
    code, _, err = run(["learn", "x.csv", "--config", path], capsys)
    assert code == 1
    assert f"run file '{path}'" in err and message in err


def test_a_missing_run_file_is_a_configuration_error(tmp_path, capsys):
    code, _, err = run(["learn", "x.csv", "--config", tmp_path / "none.toml"], capsys)
    assert code == 1 and "cannot read run file" in err


def test_learn_help_lists_its_options_in_groups_by_concern():
    text = CliRunner().invoke(cli, ["learn", "--help"]).output
    headings = ["Input:", "Outputs:", "Tree:", "Drift:", "Live feeds and checkpoints:",
                "Labels that come later:", "Run file and help:"]
    places = [text.index(h) for h in headings]
    assert places == sorted(places)
    for heading, option in zip(headings, ["--target", "--summary", "--grace-period",
                                          "--drift-delta", "--checkpoint-every",
                                          "--label-window", "--config"]):
        section = text[text.index(heading):]
        nxt = [text.index(h) - text.index(heading) for h in headings
               if text.index(h) > text.index(heading)]
        section = section[:min(nxt)] if nxt else section
        assert option in section, (heading, option)
    assert "--numeric-observer" not in text      # the old name is hidden


def test_the_old_numeric_option_still_works_and_says_its_new_name(tmp_path, capsys):
    data = _csv(tmp_path / "d.csv")
    code, _, err = run(["learn", data, "--target", "fault", "--numeric-observer",
                        "histogram", "--summary", tmp_path / "s.json", "-q"], capsys)
    assert code == 0
    assert "--numeric-observer is now --numeric-splits" in err
    # the learner ran with histogram split statistics
    code, out, _ = run(["learn", data, "--target", "fault", "--numeric-observer",
                        "histogram", "--print-config"], capsys)
    assert tomllib.loads(out)["numeric-splits"] == "histogram"


def test_format_means_the_input_format_and_form_the_printed_form(tmp_path, capsys):
    data = _csv(tmp_path / "d.csv")
    run(["learn", data, "--target", "fault", "--save", tmp_path / "m.sapwood", "-q"], capsys)
    code, as_form, _ = run(["rules", tmp_path / "m.sapwood", "--form", "json"], capsys)
    assert code == 0 and json.loads(as_form)["rules"]
    code, old, err = run(["rules", tmp_path / "m.sapwood", "--format", "json"], capsys)
    assert code == 0 and old == as_form
    assert "--format is now --form" in err


def test_diff_and_predictions_end_with_the_caution(tmp_path, capsys):
    data = _csv(tmp_path / "d.csv", rows=3000)
    code, _, err = run(["learn", data, "--target", "fault", "--snapshots", tmp_path / "s",
                        "--snapshot-every", "1000", "--predictions", tmp_path / "p.jsonl"],
                       capsys)
    assert code == 0
    assert err.rstrip("\n").endswith(CAUTION)
    for form, last in (("text", CAUTION), ("markdown", f"> {CAUTION}")):
        code, out, _ = run(["diff", tmp_path / "s", "--form", form], capsys)
        assert code == 0 and out.rstrip("\n").endswith(last)


def test_a_library_caller_meets_the_same_rules_as_the_command_line():
    with pytest.raises(ConfigError, match="an idle exit needs follow mode"):
        LearnJob(sources=["x.csv"], target="y", idle_exit=5.0)
    with pytest.raises(ConfigError, match="batch rows must be a whole number >= 1, got 0"):
        LearnJob(sources=["x.csv"], target="y", batch_rows=0)
