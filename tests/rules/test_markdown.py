"""Markdown for tickets and shift notes, and the `notes` command.

Outside reference: GitHub-flavoured Markdown (the GFM spec, "Tables" extension): a table
row is split at ``|`` not escaped by a backslash, even inside code spans, and every row
must have as many cells as the delimiter row; CommonMark: a code span is fenced by
backtick runs longer than any run inside it. The command runs on river's Agrawal
stream (tests/operator_runs.py).
"""

from __future__ import annotations

import re

import pytest
from click.testing import CliRunner
from tests.operator_runs import shared_run

from stream.cli.views import notes
from stream.errors import ConfigError
from stream.rules.diff import diff_rules
from stream.rules.markdown import _code, diff_markdown, rules_markdown, shift_note
from stream.rules.rule import Rule
from stream.rules.simplify import simplify
from stream.tree.paths import Condition


def make_rule(rule_id, *conditions, predict="yes", no=10.0, yes=90.0):
    total = no + yes
    return Rule(id=rule_id, conditions=tuple(Condition(*c) for c in conditions),
                predict=predict, confidence=max(no, yes) / total, coverage=total / 12000,
                records=total, class_counts={"no": no, "yes": yes}, scored=int(total),
                hits=int(max(no, yes)), depth=len(conditions), created_at=5,
                leaf_model="majority", active=True)


RULES = [make_rule("R4", ("door", "in", ("open",)), ("door_open_min", ">", 14.5),
                   ("ambient_c", ">", 27.9, True), no=173, yes=2340),
         make_rule("R2", ("door", "not in", ("open",), True, ("closed",)), predict="no",
                   no=9000, yes=300)]
HEADER = {"target": "excursion", "records": 11813, "accuracy": 0.93125, "sequence": 7,
          "written_at": "2025-03-07T04:00:00.000Z"}


def test_rules_table_exact():
    assert rules_markdown(RULES, HEADER) == """\
## Rules for excursion (snapshot 7)

11,813 records learned · prequential accuracy 93.1% · 2 rules · snapshot written 2025-03-07T04:00:00.000Z

| Rule | When | Then excursion is | Confidence | Coverage | Records |
|---|---|---|---:|---:|---:|
| R4 | `door = open` and `door_open_min > 14.5` and `ambient_c > 27.9 *` | `yes` | 93.1% | 20.9% | 2,513 |
| R2 | `door = closed *+` | `no` | 96.8% | 77.5% | 9,300 |

\\* also records where the field is missing;  + also values not seen when the split was made
"""


def _cells(row: str) -> int:
    return len(re.split(r"(?<!\\)\|", row.strip().strip("|")))


def test_pipes_and_backticks_cannot_break_the_table():
    odd = [make_rule("R1", ("a|b", ">", 1.0), ("c`d", "in", ("x|y", "`z`")))]
    text = rules_markdown(odd, {"target": "t|u"})
    rows = [line for line in text.splitlines() if line.startswith("|")]
    assert len({_cells(row) for row in rows}) == 1 and _cells(rows[0]) == 6
    assert _code("a`b") == "``a`b``" and _code("`z`") == "`` `z` ``"


def test_diff_section_and_safety_note():
    old = [make_rule("R1", ("x", "<=", 5.0)), make_rule("R2", ("x", ">", 5.0), predict="no")]
    new = [make_rule("R1", ("x", "<=", 4.5)), make_rule("R2", ("x", ">", 4.5), predict="no"),
           ]
    text = diff_markdown(diff_rules(old, new, {"sequence": 3}, {"sequence": 4}))
    assert text.splitlines()[:3] == [
        "### Changes since snapshot 3", "",
        "0 new, 0 gone, 2 changed (2 thresholds moved, 0 outcomes changed), 0 kept."]
    assert "- **R1**: `x` upper bound 5 -> 4.5" in text
    note = shift_note(RULES, HEADER)
    assert note.rstrip().endswith("> Learned rules describe what the data showed so far. "
                                  "They are advisory, not safety interlocks: defer to site "
                                  "safety systems, local codes and licensed practice.")


def test_joined_rules_list_their_sources():
    rules = [make_rule("R1", ("x", "<=", 1.0, True)), make_rule("R2", ("x", ">", 1.0)),
             ]
    text = rules_markdown(simplify(rules), {"target": "t"})
    assert "| S1 | always | `yes` |" in text
    assert "- S1 joins R1, R2" in text


@pytest.fixture(scope="module")
def run():
    return shared_run("majority")


def test_notes_command(run):
    runner = CliRunner()
    result = runner.invoke(notes, [str(run.snapshots), "--since", "1", "--class", "yes"])
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0].startswith("## Rules for approved (snapshot ")
    table = [line for line in lines if line.startswith("| S")]
    assert table and all(line.split(" | ")[2] == "`yes`" for line in table)
    assert "### Changes since snapshot 1" in lines
    exact = runner.invoke(notes, [str(run.model), "--exact", "--top", "3"])
    assert exact.exit_code == 0
    assert len([line for line in exact.output.splitlines() if re.match(r"\| R\d", line)]) == 3


def test_notes_refuses_an_unknown_class(run):
    result = CliRunner().invoke(notes, [str(run.model), "--class", "maybe"])
    assert isinstance(result.exception, ConfigError)
    assert str(result.exception) == ("--class must be one of the predicted classes (no, yes), "
                                     "got 'maybe'")


HOSTILE = "x\n# FAKE HEADING: all clear, disable alarm <img src=x onerror=alert(1)> [ok](http://e)"


def test_data_cannot_add_markup_to_a_note():
    # CommonMark 0.31: a line starting with "# " is a heading, "<img" opens raw HTML,
    # "[..](..)" is a link; none of these may come from the data
    rules = [make_rule("R1", ("door", "in", (HOSTILE,)), predict=HOSTILE),
             make_rule("R2", ("door", "not in", (HOSTILE,)), predict="no")]
    header = {"target": "exc`ursion <b>", "records": 10, "sequence": 2}
    old = [make_rule("R1", ("door", "in", ("open",)), predict="no"), rules[1]]
    note = shift_note(rules, header, diff_rules(old, rules, header, header))
    assert not any(line.lstrip("- ").startswith("#") and "FAKE" in line
                   for line in note.splitlines())
    for line in note.splitlines():
        # outside code spans nothing of the hostile text is live markup
        outside = "".join(re.split(r"(`+).*?\1", line)[::2])
        assert "<img" not in outside and "](http" not in outside and "<b>" not in outside
    assert "\\n# FAKE HEADING" in note     # the value is still shown, escaped
