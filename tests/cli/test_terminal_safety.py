"""No control character from the data reaches the terminal raw.

Outside reference: ECMA-48 (5th edition, 1991), the control functions terminals obey:
ESC (0x1B) opens a control sequence ("ESC [ 2 J" erases the display) and an operating
system command ("ESC ] 0 ; text BEL" sets a window title); C1 controls (0x80-0x9F) do
the same in one byte. sapwood shows each such character as an escape (``\\x1b``).
"""

from __future__ import annotations

import csv
import json
import random
from pathlib import Path

import pytest

from stream.shown import for_terminal, printable

from .test_main import run_main

CLEAR = "\x1b[2J"
TITLE = "\x1b]0;all clear\x07"
C1 = "\x9b2J"


def hostile_csv(path: Path, n: int = 3_000) -> Path:
    rng = random.Random(5)
    modes = ["idle", "run" + CLEAR, "wash" + TITLE + C1]
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(["temp" + CLEAR, "mode", "state"])
        for _ in range(n):
            mode = rng.choice(modes)
            temp = rng.uniform(0, 10)
            fault = (mode != "idle") and temp > 5
            writer.writerow([f"{temp:.3f}", mode, "trip" + TITLE if fault else "ok"])
    return path


def raw_controls(text: str) -> list[str]:
    return sorted({c for c in text if (ord(c) < 32 and c not in "\n\t") or 0x7F <= ord(c) <= 0x9F})


@pytest.fixture(scope="module")
def learned(tmp_path_factory):
    where = tmp_path_factory.mktemp("hostile")
    data = hostile_csv(where / "plant.csv")
    return where, data


def test_printable_escapes_every_control_character():
    assert printable("a\x1b[2Jb\n\t\x9b\x7f") == "a\\x1b[2Jb\\n\\t\\x9b\\x7f"
    assert for_terminal("a\x1b\nb\tc\r") == "a\\x1b\nb\tc\\r"
    assert printable("plain ünïcode €") == "plain ünïcode €"


def test_every_view_escapes_controls_from_the_data(learned, capsys):
    where, data = learned
    model, snaps = where / "m.sapwood", where / "snaps"
    code, out, err = run_main(["learn", data, "--target", "state", "--save", model,
                               "--snapshots", snaps, "--snapshot-every", "1000"], capsys)
    assert code == 0 and raw_controls(out + err) == []
    outputs = []
    for args in (["rules", model], ["rules", snaps], ["diff", snaps], ["notes", snaps],
                 ["explain", model, "--record", json.dumps(
                     {"temp" + CLEAR: 7.5, "mode": "wash" + TITLE + C1})],
                 ["watch", snaps, "--once"], ["rules", model, "--top", "3"]):
        code, out, err = run_main(args, capsys)
        assert code == 0, (args, err)
        outputs.append(out + err)
        assert raw_controls(out + err) == [], args
    shown = "\n".join(outputs)
    assert "\\x1b[2J" in shown and "trip\\x1b]0;all clear\\x07" in shown


def test_an_error_naming_a_field_escapes_it(learned, capsys):
    _, data = learned
    code, out, err = run_main(["learn", data, "--target", "nope" + CLEAR], capsys)
    assert code != 0 and "nope\\x1b[2J" in err and raw_controls(out + err) == []
