"""Progress of a long run on stderr: records, rate, and how long is left when that is known.

Inside: :class:`ProgressLine` (a callable the engine calls after each batch with its
facts) and :func:`input_size` (the total size of the input files, when every input is a
regular file). Nothing is written when the stream is not a terminal, so logs and pipes
stay clean.

The share done and the time left need the bytes read so far: the engine passes
``bytes_read`` among its facts when the source reports it (for gzip files, compressed
bytes, to compare with the compressed size on disk). Without it, or when the size is
unknown (standard input, a pipe), the line shows records and rate only.
"""

from __future__ import annotations

import os
import stat
import sys
import time
from typing import Callable, Sequence, TextIO


def input_size(specs: Sequence[str]) -> int | None:
    """Total bytes of the inputs, or None if one is standard input or not a regular file."""
    total = 0
    for spec in specs:
        if spec == "-":
            return None
        try:
            info = os.stat(spec)
        except OSError:
            return None
        if not stat.S_ISREG(info.st_mode):
            return None
        total += info.st_size
    return total


def format_duration(seconds: float) -> str:
    """Rounded for a progress line: ``45 s``, ``3 min 20 s``, ``2 h 05 min``."""
    seconds = max(0, round(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, seconds = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def _size(n: float) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:,.0f} {unit}" if unit == "bytes" else f"{n:,.1f} {unit}"
        n /= 1024
    return f"{n:,.1f} TiB"  # pragma: no cover


class ProgressLine:
    """One line on stderr, rewritten at most every ``every`` seconds, only on a terminal.

    Parameters
    ----------
    stream
        Where to write (stderr by default); nothing is written unless it is a terminal.
    clock
        Seconds from any fixed origin, for the refresh interval (tests pass a fake).
    total_bytes
        Size of the input (see :func:`input_size`), None if unknown.
    every
        Least seconds between two updates of the line.
    """

    def __init__(self, stream: TextIO | None = None,
                 clock: Callable[[], float] = time.monotonic,
                 total_bytes: int | None = None, every: float = 0.5) -> None:
        self.stream = stream or sys.stderr
        self.clock = clock
        self.total_bytes = total_bytes if total_bytes else None
        self.every = every
        self.enabled = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.last: float | None = None
        self.width = 0

    def text(self, facts: dict) -> str:
        """The line for ``facts`` (records, rate, seconds, quarantined, bytes_read)."""
        parts = [f"sapwood: {facts['records']:,} records", f"{facts['rate']:,.0f} records/s"]
        read = facts.get("bytes_read")
        if self.total_bytes and read:
            share = min(read / self.total_bytes, 1.0)
            parts.append(f"{100 * share:.0f}% of {_size(self.total_bytes)}")
            seconds = facts.get("seconds") or 0.0
            if seconds > 0 and share < 1.0:
                left = (self.total_bytes - read) / (read / seconds)
                parts.append(f"about {format_duration(left)} left")
        if facts.get("quarantined"):
            parts.append(f"{facts['quarantined']:,} quarantined")
        return ", ".join(parts)

    def __call__(self, facts: dict) -> None:
        if not self.enabled:
            return
        now = self.clock()
        if self.last is not None and now - self.last < self.every:
            return
        self.last = now
        line = self.text(facts)
        # pad with spaces so a shorter line fully covers the one before
        self.stream.write("\r" + line + " " * max(self.width - len(line), 0))
        self.stream.flush()
        self.width = len(line)

    def done(self) -> None:
        """End the line (if one was shown) so the next message starts on its own."""
        if self.width:
            self.stream.write("\n")
            self.stream.flush()
            self.width = 0
