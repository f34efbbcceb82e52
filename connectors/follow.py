"""Follow mode: keep reading a file that grows, is rotated or is truncated, as a log reader does.

Inside: :class:`FollowControl` (poll interval, idle limit, the stop request, the clock),
:class:`GrowingFile` (one file, i.e. one inode, as a live byte stream that waits for
more bytes), :exc:`FollowStopped` (following ended: a stop was requested or the feed was
idle too long) and :exc:`FileRestarted` (the file was truncated or rewritten in place).

How changes are told apart, checked each time the reader has caught up with the file:

* **growth**: the open file has bytes beyond the read offset; they are read.
* **rotation**: the path names another file (device and inode differ) -- the old one
  was renamed away and a new one created (``logrotate`` ``create``, ``mv log log.1``).
  The old file is read to its end first, since the writer may have added lines just
  before it switched; then its stream ends and the caller opens the new file. While
  the path names no file at all (between rename and create), waiting goes on.
* **truncation**: the open file is shorter than the read offset (``copytruncate``,
  ``: > log``), or the ``MARK_BYTES`` bytes just before the read offset are no longer
  the ones read (truncated and refilled past the offset between two polls).
  :exc:`FileRestarted` tells the caller to read the same path from its start.

A line being written (no line break yet) is never handed out by the readers of a live
stream, so a stop never cuts a record in half. Polling sleeps on the stop request, so
a stop (SIGINT/SIGTERM in ``sapwood learn``) ends the wait at once.

Limitations: a file rotated twice within one poll interval loses the lines written to
the middle one after the previous poll; lines a writer appends to a rotated file after
the new file has been read to its first poll are not read (the same as ``tail -F``).
Followed files must be plain text (gzip streams cannot be followed as they grow).
"""

from __future__ import annotations

import dataclasses
import os
import threading
import time
from typing import Callable

from .delimited import MARK_BYTES

DEFAULT_POLL_SECONDS = 0.5
_READ_SIZE = 1 << 20


class FollowStopped(Exception):
    """Following ended on purpose; ``reason`` is ``"stop"`` or ``"idle"``."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


class FileRestarted(Exception):
    """The followed file was truncated or rewritten in place: read it again from 0."""


@dataclasses.dataclass
class FollowControl:
    """How followed files are polled and when following ends.

    Parameters
    ----------
    poll_seconds
        Sleep between checks of an idle file.
    idle_exit
        End (``FollowStopped("idle")``) after this many seconds without a new byte;
        None follows until stopped.
    stop
        Set it to end following at the next check (signal handlers set it).
    clock
        Monotonic seconds; tests pass a fake one.
    on_idle
        Called (in the reading thread, between two batches of the reader) each time
        the reader has caught up with the file and is about to wait: a learning run
        learns what it holds back and writes a checkpoint if one is due.
    """

    poll_seconds: float = DEFAULT_POLL_SECONDS
    idle_exit: float | None = None
    stop: threading.Event = dataclasses.field(default_factory=threading.Event)
    clock: Callable[[], float] = time.monotonic
    on_idle: Callable[[], None] | None = None
    last_data: float | None = None

    def idle(self) -> None:
        if self.on_idle is not None:
            self.on_idle()

    def note_data(self) -> None:
        self.last_data = self.clock()

    def check(self) -> None:
        """Raise FollowStopped when a stop was asked for or the feed was idle too long."""
        if self.stop.is_set():
            raise FollowStopped("stop")
        if self.last_data is None:
            self.last_data = self.clock()
        if self.idle_exit is not None and self.clock() - self.last_data >= self.idle_exit:
            raise FollowStopped("idle")

    def wait(self) -> None:
        self.stop.wait(self.poll_seconds)


def identity(st: os.stat_result) -> tuple[int, int]:
    """(device, inode): what tells two files apart whatever their names."""
    return st.st_dev, st.st_ino


class GrowingFile:
    """One followed file as a live byte stream: ``read`` waits for bytes to arrive.

    Parameters
    ----------
    path
        The name followed; watched for rotation.
    control
        Poll interval, idle limit, stop request.
    handle
        The file, opened unbuffered (``open(path, "rb", buffering=0)``), standing at
        ``offset``; its inode may no longer be the one ``path`` names (a file rotated
        while sapwood was down is read to its end first).
    offset
        Where ``handle`` stands.
    mark
        Bytes just before ``offset`` as read earlier (a resumed file), for the
        rewritten-in-place check.

    ``read`` returns b"" (end of this file) only after a rotation, once the old file is
    read to its end; it raises :exc:`FileRestarted` on truncation and
    :exc:`FollowStopped` when following ends.
    """

    live = True

    def __init__(self, path: str, control: FollowControl, handle, offset: int = 0,
                 mark: bytes = b"") -> None:
        self.path = path
        self.control = control
        self._raw = handle
        self.identity = identity(os.fstat(handle.fileno()))
        self.offset = offset
        self._recent = mark[-MARK_BYTES:]
        self.rotated = False

    def fileno(self) -> int:
        return self._raw.fileno()

    def read(self, size: int = -1) -> bytes:
        if size is None or size < 0:
            size = _READ_SIZE
        data = self._take(size)
        if data:
            return data
        idle = False
        while True:
            # checked before reading what came during a wait: a file truncated and
            # refilled meanwhile must not be read on from the old offset
            change = self._change()
            if change == "rotated":
                data = self._take(size)  # lines written just before the switch
                if data:
                    return data
                self.rotated = True
                return b""
            if change == "truncated":
                raise FileRestarted(self.path)
            data = self._take(size)
            if data:
                return data
            self.control.check()
            if not idle:
                idle = True
                self.control.idle()
            self.control.wait()

    def _take(self, size: int) -> bytes:
        data = self._raw.read(size) or b""
        if data:
            self.offset += len(data)
            self._recent = (self._recent + data[-MARK_BYTES:])[-MARK_BYTES:]
            self.control.note_data()
        return data

    def _change(self) -> str | None:
        fd = self._raw.fileno()
        if os.fstat(fd).st_size < self.offset:
            return "truncated"
        if self._recent and os.pread(fd, len(self._recent),
                                     self.offset - len(self._recent)) != self._recent:
            return "truncated"  # rewritten in place and refilled past our offset
        try:
            now = identity(os.stat(self.path))
        except FileNotFoundError:
            return None  # renamed away, the new file is not there yet
        return "rotated" if now != self.identity else None

    def close(self) -> None:
        self._raw.close()


def find_by_identity(path: str, wanted: tuple[int, int]) -> str | None:
    """A file in ``path``'s directory with device and inode ``wanted`` (a rotated file
    under its new name), or None."""
    directory = os.path.dirname(os.path.abspath(path))
    try:
        entries = list(os.scandir(directory))
    except OSError:
        return None
    for entry in entries:
        try:
            if entry.is_file(follow_symlinks=False) and entry.inode() == wanted[1] \
                    and entry.stat(follow_symlinks=False).st_dev == wanted[0]:
                return entry.path
        except OSError:
            continue
    return None


def content_matches(handle, offset: int, mark: bytes) -> bool:
    """True when ``handle`` (a seekable binary file) is at least ``offset`` bytes long
    and holds ``mark`` just before ``offset``; leaves it standing at ``offset``."""
    start = offset - len(mark)
    if start < 0:
        return False
    handle.seek(start)
    got = b""
    while len(got) < len(mark):
        more = handle.read(len(mark) - len(got))
        if not more:
            return False
        got += more
    if got != mark:
        return False
    if not mark:
        handle.seek(offset)
    return True
