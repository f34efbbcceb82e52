"""Atomic file replacement: readers see the old file or the new one, never a half-written one.

Inside: :func:`atomic_writer` (a context manager yielding a file object) and
:func:`write_atomic` (one call for bytes or text). Both write to a hidden temporary file
in the target's directory, flush and ``fsync`` it, ``os.replace`` it onto the target and
``fsync`` the directory. If anything fails before the replace, the temporary file is
removed and the target is left exactly as it was.

Why this order (standards relied on):

- ``os.replace`` is ``rename(2)``; POSIX.1 (``rename()``, "If the link named by the new
  argument exists ... a link named new shall remain visible to other processes throughout
  the renaming operation and refer either to the file referred to by new or old") makes the
  swap atomic for readers. The Python docs of ``os.replace`` state the same ("a POSIX
  requirement"). The rename is atomic only within one file system, hence the temporary
  file lives in the target's own directory.
- ``fsync`` of the file before the rename, so a crash cannot leave the new name pointing at
  data that never reached the disk; ``fsync`` of the directory after it, because the Linux
  ``fsync(2)`` manual says syncing a file does not necessarily persist its directory entry
  (from memory; common practice in databases and package managers).
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable, Iterator
from typing import IO

from stream.errors import ConfigError

_MODES = ("wb", "w")


def write_atomic(path: str | os.PathLike, data: bytes | str,
                 before_replace: Callable[[], None] | None = None) -> None:
    """Replace ``path`` with ``data`` atomically (``str`` is written as UTF-8).

    Parameters
    ----------
    path
        Target file; its directory must exist.
    data
        The whole new content.
    before_replace
        Called once the new content is on disk, just before it replaces ``path``; an
        exception from it leaves ``path`` as it was (a fencing check).
    """
    if isinstance(data, str):
        data = data.encode("utf-8")
    with atomic_writer(path, "wb", before_replace) as handle:
        handle.write(data)


@contextlib.contextmanager
def atomic_writer(path: str | os.PathLike, mode: str = "wb",
                  before_replace: Callable[[], None] | None = None) -> Iterator[IO]:
    """Yield a file whose content replaces ``path`` only when the block ends without error.

    Parameters
    ----------
    path
        Target file; its directory must exist.
    mode
        ``"wb"`` for bytes or ``"w"`` for text (UTF-8, newlines written as given).
    before_replace
        As in :func:`write_atomic`.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> scratch = tempfile.TemporaryDirectory()
    >>> target = pathlib.Path(scratch.name) / "rules.txt"
    >>> with atomic_writer(target, "w") as out:
    ...     _ = out.write("IF flow < 3.2 THEN alarm\\n")
    >>> target.read_text()
    'IF flow < 3.2 THEN alarm\\n'
    >>> scratch.cleanup()
    """
    if mode not in _MODES:
        raise ConfigError(f"atomic writer mode must be one of 'wb', 'w', got {mode!r}")
    target = os.path.abspath(os.fspath(path))
    directory, name = os.path.split(target)
    # Hidden name with a random part: never mistaken for the target or a sibling's temp file.
    fd, temp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=directory)
    try:
        try:
            _set_mode(fd, target)
            if mode == "wb":
                handle = os.fdopen(fd, "wb")
            else:
                handle = os.fdopen(fd, "w", encoding="utf-8", newline="")
        except BaseException:
            os.close(fd)
            raise
        with handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        if before_replace is not None:
            before_replace()
        os.replace(temp, target)
    except BaseException:
        # BaseException too: an interrupt mid-write must not leave a stray temp file.
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temp)
        raise
    _fsync_directory(directory)


def _set_mode(fd: int, target: str) -> None:
    """Give the new file the target's permissions, or the usual ones for a new file.

    ``mkstemp`` creates files readable by the owner only; snapshots and checkpoints are
    meant to be read by other tools and people.
    """
    if not hasattr(os, "fchmod"):
        return
    try:
        mode = os.stat(target).st_mode & 0o7777
    except FileNotFoundError:
        mode = 0o666 & ~_current_umask()
    os.fchmod(fd, mode)


def _current_umask() -> int:
    # /proc avoids the set-and-restore dance of os.umask, which is not thread-safe.
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _fsync_directory(directory: str) -> None:
    flags = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0)
    try:
        fd = os.open(directory, flags)
    except OSError:
        # Platforms without directory handles (Windows) persist renames differently.
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
