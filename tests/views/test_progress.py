"""The progress line: only on a terminal, rate limited, share done and time left.

No outside reference applies beyond arithmetic: time left = bytes left / bytes per
second so far (common practice for progress estimates).
"""

from __future__ import annotations

import io

from stream.views.progress import ProgressLine, format_duration, input_size


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def test_nothing_is_written_when_not_a_terminal():
    out = io.StringIO()
    line = ProgressLine(out, total_bytes=1000)
    line({"records": 10, "rate": 5.0, "seconds": 2.0, "bytes_read": 100})
    line.done()
    assert out.getvalue() == ""


def test_share_done_and_time_left():
    out, clock = FakeTerminal(), Clock()
    line = ProgressLine(out, clock, total_bytes=4 * 1024 * 1024)
    # a quarter read in 30 s: three quarters left at the same pace is 90 s
    line({"records": 250_000, "rate": 8333.3, "seconds": 30.0,
          "bytes_read": 1024 * 1024, "quarantined": 3})
    assert out.getvalue() == ("\rsapwood: 250,000 records, 8,333 records/s, 25% of 4.0 MiB, "
                              "about 1 min 30 s left, 3 quarantined")


def test_rate_limited_and_padded_over_a_longer_line():
    out, clock = FakeTerminal(), Clock()
    line = ProgressLine(out, clock, every=0.5)
    line({"records": 1, "rate": 1.0, "seconds": 1.0, "quarantined": 12})
    clock.now = 0.2
    line({"records": 2, "rate": 1.0, "seconds": 1.2})  # too soon: skipped
    clock.now = 0.7
    line({"records": 3, "rate": 1.0, "seconds": 1.7})
    first = "\rsapwood: 1 records, 1 records/s, 12 quarantined"
    second = "\rsapwood: 3 records, 1 records/s"
    assert out.getvalue() == first + second + " " * (len(first) - len(second))
    line.done()
    assert out.getvalue().endswith("\n")


def test_no_share_without_a_size_or_bytes():
    line = ProgressLine(FakeTerminal(), total_bytes=None)
    assert line.text({"records": 5, "rate": 2.0, "seconds": 2.0, "bytes_read": 10}) == \
        "sapwood: 5 records, 2 records/s"
    sized = ProgressLine(FakeTerminal(), total_bytes=100)
    assert sized.text({"records": 5, "rate": 2.0, "seconds": 2.0}) == \
        "sapwood: 5 records, 2 records/s"


def test_input_size(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_bytes(b"x" * 10)
    b.write_bytes(b"y" * 32)
    assert input_size([str(a), str(b)]) == 42
    assert input_size([str(a), "-"]) is None
    assert input_size([str(tmp_path / "missing.csv")]) is None
    assert input_size([str(tmp_path)]) is None


def test_format_duration():
    assert [format_duration(s) for s in (0, 44.6, 60, 3599, 3600, 7500)] == \
        ["0 s", "45 s", "1 min 00 s", "59 min 59 s", "1 h 00 min", "2 h 05 min"]
