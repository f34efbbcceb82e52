"""Files and standard input as one stream of record batches, with the format registry.

Inside: ``FORMATS`` (format name -> reader class; the CLI takes its choices from it),
:func:`format_of` (format from a file name), :func:`sniff_format` (format from the first
bytes of standard input), and :func:`open_sources`, which chains several inputs (and, in
follow mode, reads the last one on as it grows) or opens a broker source.

Every batch of a file carries its ``position`` (see :class:`ChainedSource`), from which
:meth:`ChainedSource.seek` resumes after a restart.

Gzip is recognised by its magic bytes (1f 8b, RFC 1952), whatever the file is called.
Files are checked for readability when the source is opened, so a typo fails at once;
they are then opened one at a time, when their turn comes.
"""

from __future__ import annotations

import gzip
import logging
import os
import select
import stat
import sys
import zlib
from typing import BinaryIO, Callable, Iterator

from stream.checks import require_int
from stream.errors import ConfigError, InputError, SchemaError

from .base import ColumnHints, RawBatch, Source
from .delimited import CsvReader, TsvReader
from .follow import (FileRestarted, FollowControl, GrowingFile, content_matches,
                     find_by_identity, identity)
from .jsonlines import JsonLinesReader
from .parquet import ParquetReader

log = logging.getLogger("sapwood.connectors")

FORMATS = {
    "csv": CsvReader,
    "tsv": TsvReader,
    "jsonl": JsonLinesReader,
    "parquet": ParquetReader,
}
"""Format name -> reader class. A reader takes (opener, origin, batch_rows) and lists
its file name ``extensions``; adding a format is one line here."""
_DELIMITED = ("csv", "tsv")

STDIN = "-"
_GZIP_MAGIC = b"\x1f\x8b"
_SNIFF_BYTES = 1 << 16


def _extensions() -> dict[str, str]:
    return {ext: name for name, reader in FORMATS.items() for ext in reader.extensions}


def format_of(path: str) -> str | None:
    """Format named by a file's extension (``.gz`` aside), or None."""
    name = path.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    return _extensions().get(os.path.splitext(name)[1])


def sniff_format(head: bytes) -> str:
    """Guess the format of decompressed leading bytes.

    First non-blank byte ``{`` -> jsonl; else a tab in the first non-blank line -> tsv;
    else csv.
    """
    text = head.removeprefix(b"\xef\xbb\xbf").lstrip()  # a UTF-8 byte order mark first
    if text.startswith(b"{"):
        return "jsonl"
    if b"\t" in text.split(b"\n", 1)[0]:
        return "tsv"
    return "csv"


def input_error(origin: str, exc: BaseException) -> InputError:
    """InputError for an input that failed: "cannot read 'x.csv': No such file or directory"."""
    reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    return InputError(f"cannot read {origin!r}: {reason}")


_READ_ERRORS = (OSError, EOFError, zlib.error)


# ---------------------------------------------------------------------------------------
# byte streams
# ---------------------------------------------------------------------------------------

class _Prefixed:
    """Bytes already read (for sniffing), then the rest of a stream."""

    def __init__(self, head: bytes, rest) -> None:
        self._head = head
        self._rest = rest
        self.live = getattr(rest, "live", False)

    def read(self, size: int = -1) -> bytes:
        if self._head:
            if size < 0:
                data, self._head = self._head + self._rest.read(), b""
                return data
            data, self._head = self._head[:size], self._head[size:]
            return data
        return self._rest.read(size)

    def close(self) -> None:
        self._rest.close()


_LINGER = 0.005
"""Seconds live standard input waits for more bytes before handing out a short read: a
fast producer then fills whole blocks (a pipe holds 64 KiB), a slow one waits 5 ms."""


class _LiveStdin:
    """Standard input that returns what has arrived instead of waiting for a full block.

    A producer writing a few records a second must not wait for megabytes to pile up.
    """

    live = True

    def __init__(self, raw) -> None:
        self._raw = raw
        self._fd = raw.fileno()

    def read(self, size: int = -1) -> bytes:
        if size < 0:
            return self._raw.read()
        data = self._raw.read1(size)
        parts, have = [data], len(data)
        while data and have < size and select.select([self._fd], [], [], _LINGER)[0]:
            data = self._raw.read1(size - have)
            parts.append(data)
            have += len(data)
        return b"".join(parts)

    def close(self) -> None:
        """Standard input belongs to the process; it is left open."""


class _KeepOpen:
    """A stream the caller owns: read it, never close it."""

    def __init__(self, raw) -> None:
        self._raw = raw

    def read(self, size: int = -1) -> bytes:
        return self._raw.read(size)

    def close(self) -> None:
        pass


def _live(raw) -> object:
    """Wrap standard input: live when it is a pipe, terminal or socket, not a file."""
    try:
        regular = stat.S_ISREG(os.fstat(raw.fileno()).st_mode)
        raw.read1
    except (AttributeError, OSError, ValueError):
        return _KeepOpen(raw)
    return _KeepOpen(raw) if regular else _LiveStdin(raw)


def _read_head(stream, size: int) -> bytes:
    """Read until a line break, EOF or ``size`` bytes (live input may come in pieces)."""
    parts, have = [], 0
    while have < size:
        data = stream.read(size - have)
        if not data:
            break
        parts.append(data)
        have += len(data)
        if b"\n" in data:
            break
    return b"".join(parts)


def _open_file(path: str) -> BinaryIO:
    raw = open(path, "rb")
    if raw.peek(2)[:2] == _GZIP_MAGIC:
        raw.close()
        return gzip.open(path, "rb")
    return raw


# ---------------------------------------------------------------------------------------
# inputs and the chained source
# ---------------------------------------------------------------------------------------

def _reader_position(position: dict | None) -> dict | None:
    """The part of a source position a reader resumes from."""
    if position is None:
        return None
    return {k: position[k] for k in ("offset", "line", "mark", "columns", "header_line")
            if k in position}


def _reader(fmt: str, names: list[str] | None, *args, hints: ColumnHints | None = None,
            **kwargs):
    """The reader of format ``fmt``; ``names`` (a header of the user's) and ``hints``
    for CSV and TSV."""
    if fmt in _DELIMITED:
        return FORMATS[fmt](*args, names=names, hints=hints, **kwargs)
    if names is not None:
        raise ConfigError(f"--header names the columns of CSV and TSV files; "
                          f"{args[1]!r} is read as {fmt}")
    return FORMATS[fmt](*args, **kwargs)


class _FileInput:
    """One named file, read to its end."""

    names: list[str] | None = None
    hints: ColumnHints | None = None

    def __init__(self, path: str, fmt: str) -> None:
        self.origin = path
        self._format = fmt

    def batches(self, index: int, batch_rows: int, resume: dict | None,
                check: Callable[[str, list[str]], None]) -> Iterator[RawBatch]:
        path = self.origin
        stream = _open_file(path)
        try:
            if resume is not None and not content_matches(
                    stream, int(resume["offset"]), bytes.fromhex(resume.get("mark", ""))):
                raise ConfigError(
                    f"{path!r} is not the file the checkpoint was taken from: it no longer "
                    f"holds the bytes read up to offset {int(resume['offset'])} (it was "
                    f"replaced or shortened); remove the checkpoint to learn it from the "
                    f"start")
            reader = _reader(self._format, self.names, lambda: stream, path, batch_rows,
                             resume=_reader_position(resume), hints=self.hints)
            if reader.columns is not None:
                check(path, reader.columns)
            fd = stream.fileno()
            for batch in reader.batches():
                st = os.fstat(fd)
                batch.position = {"input": index, "path": path, "device": st.st_dev,
                                  "inode": st.st_ino, "size": st.st_size, **batch.position}
                yield batch
        finally:
            stream.close()


class _FollowedInput:
    """The last named file in follow mode: read on as it grows, across rotations and
    truncations (see :mod:`connectors.follow`)."""

    names: list[str] | None = None

    hints: ColumnHints | None = None

    def __init__(self, path: str, fmt: str, control: FollowControl) -> None:
        self.origin = path
        self._format = fmt
        self.control = control
        self.restarts = 0

    def batches(self, index: int, batch_rows: int, resume: dict | None,
                check: Callable[[str, list[str]], None]) -> Iterator[RawBatch]:
        path = self.origin
        known = list(resume["columns"]) if resume and resume.get("columns") else None
        handle, offset, mark = self._resume(resume)
        at = resume if offset else None
        while True:
            stream = GrowingFile(path, self.control, handle, offset, mark)
            reader = _reader(self._format, self.names, lambda ready=stream: ready, path,
                             batch_rows, resume=_reader_position(at), known_columns=known,
                             hints=self.hints)
            try:
                if reader.columns is not None:
                    check(path, reader.columns)
                    known = reader.columns
                device, inode = stream.identity
                for batch in reader.batches():
                    batch.position = {"input": index, "path": path, "device": device,
                                      "inode": inode, "size": os.fstat(stream.fileno()).st_size,
                                      **batch.position}
                    yield batch
                if not stream.rotated:  # pragma: no cover - a growing file never ends
                    return
                log.info("%s was rotated; reading the new file from its start", path)
            except FileRestarted:
                log.warning("%s was truncated or rewritten; reading it from its start", path)
            finally:
                stream.close()
            self.restarts += 1
            handle, offset, mark, at = self._open_new(), 0, b"", None

    def _open_new(self):
        while True:
            try:
                return open(self.origin, "rb", buffering=0)
            except FileNotFoundError:
                self.control.check()
                self.control.wait()

    def _resume(self, resume: dict | None):
        """(handle, offset, mark) to go on from a checkpoint's position."""
        if resume is None:
            return self._open_new(), 0, b""
        path = self.origin
        offset, mark = int(resume["offset"]), bytes.fromhex(resume.get("mark", ""))
        wanted = (int(resume["device"]), int(resume["inode"]))
        candidates = []
        try:
            if identity(os.stat(path)) == wanted:
                candidates.append(path)
        except FileNotFoundError:
            pass
        if not candidates:
            moved = find_by_identity(path, wanted)
            if moved is not None:
                log.info("%s was rotated while sapwood was stopped; finishing %s first",
                         path, moved)
                candidates.append(moved)
            elif os.path.exists(path):
                candidates.append(path)  # a copy or restore holds the same bytes
        for candidate in candidates:
            handle = open(candidate, "rb", buffering=0)
            if content_matches(handle, offset, mark):
                return handle, offset, mark
            handle.close()
        log.warning("%s: the file the checkpoint was reading (offset %d) is gone or was "
                    "truncated; reading %s from its start (lines written to the old file "
                    "after the checkpoint are lost)", path, offset, path)
        return self._open_new(), 0, b""


class _StdinInput:
    origin = STDIN
    names: list[str] | None = None
    hints: ColumnHints | None = None

    def __init__(self, stream, fmt: str | None) -> None:
        self._stream = stream
        self._format = fmt

    def reader(self, batch_rows: int):
        raw = self._stream if self._stream is not None else sys.stdin.buffer
        stream = _live(raw)
        head = _read_head(stream, 2)
        stream = _Prefixed(head, stream)
        if head[:2] == _GZIP_MAGIC:
            stream = gzip.GzipFile(fileobj=stream, mode="rb")
        fmt = self._format
        if fmt is None:
            head = _read_head(stream, _SNIFF_BYTES)
            stream = _Prefixed(head, stream)
            fmt = sniff_format(head)
        ready = stream
        return _reader(fmt, self.names, lambda: ready, STDIN, batch_rows, hints=self.hints)

    def batches(self, index: int, batch_rows: int, resume: dict | None,
                check: Callable[[str, list[str]], None]) -> Iterator[RawBatch]:
        reader = self.reader(batch_rows)
        try:
            if reader.columns is not None:
                check(STDIN, reader.columns)
            for batch in reader.batches():
                batch.position = None  # standard input cannot be read again
                yield batch
        finally:
            reader.close()


class ChainedSource:
    """Several inputs read one after the other, as one resumable source.

    Delimited inputs must share their columns; the first that differs raises SchemaError.
    Each batch's ``position`` names the input (``input``: its index, ``path``), the
    file's identity and size when the batch was read (``device``, ``inode``, ``size``)
    and the reader's place in it (``offset`` of the next unread byte, ``line``, ``mark``,
    and for delimited files ``columns`` and ``header_line``); None for standard input.
    :meth:`seek` with such a position makes :meth:`batches` go on just after it.
    """

    def __init__(self, inputs: list, batch_rows: int) -> None:
        self._inputs = inputs
        self._batch_rows = batch_rows
        self._resume: dict | None = None
        self._iterating = None
        self.name = ", ".join(inp.origin for inp in inputs)
        self.header_columns: list[str] | None = None
        """The columns of the first header read (delimited inputs), even with no record."""
        self.hints = ColumnHints()
        """What the run settles about the columns, handed to every input's reader."""
        for inp in inputs:
            inp.hints = self.hints

    @property
    def resumable(self) -> bool:
        """False when standard input is among the inputs."""
        return not any(isinstance(inp, _StdinInput) for inp in self._inputs)

    def seek(self, position: dict) -> None:
        """Go on after ``position`` (a batch position of this same list of inputs)."""
        try:
            index = int(position["input"])
            int(position["offset"]), int(position["line"])
        except (KeyError, TypeError, ValueError):
            raise ConfigError(f"the checkpoint's source position is not a file position: "
                              f"{position!r}") from None
        if not 0 <= index < len(self._inputs) or \
                self._inputs[index].origin != position.get("path"):
            raise ConfigError(f"the checkpoint was reading {position.get('path')!r} as input "
                              f"{index + 1}, which is not among this run's sources")
        self._resume = dict(position)

    def commit(self, position: dict) -> None:
        """Files need no acknowledgement: a checkpoint's position is all they need."""

    def batches(self) -> Iterator[RawBatch]:
        """Yield the batches of every input in order (after the :meth:`seek` position)."""
        self.close()
        self._iterating = self._batches()
        return self._iterating

    def _batches(self) -> Iterator[RawBatch]:
        reference: list[tuple[str, list[str]]] = []
        resume, first = self._resume, 0
        if resume is not None:
            first = int(resume["input"])
            if resume.get("columns"):
                reference.append((resume["path"], list(resume["columns"])))

        def check(origin: str, columns: list[str]) -> None:
            if self.header_columns is None:
                self.header_columns = list(columns)
            if not reference:
                reference.append((origin, columns))
            else:
                _check_same_columns(reference[0], (origin, columns))

        for index in range(first, len(self._inputs)):
            inp = self._inputs[index]
            at = resume if index == first else None
            try:
                yield from inp.batches(index, self._batch_rows, at, check)
            except _READ_ERRORS as exc:
                raise input_error(inp.origin, exc) from exc

    def close(self) -> None:
        """Stop the iteration under way (its open file is closed); safe to call twice."""
        if self._iterating is not None:
            iterating, self._iterating = self._iterating, None
            iterating.close()


def _folder_files(spec: str, fmt: str | None) -> list[str]:
    """A folder's files of one format (``fmt``, else the one its files' names share,
    e.g. the parts of a Parquet dataset) in name order; any other spec, and a folder
    holding no file sapwood reads, as it is (opening it then says what is wrong)."""
    if spec == STDIN or not os.path.isdir(spec):
        return [spec]
    names = sorted(n for n in os.listdir(spec) if not n.startswith((".", "_")))
    kinds = {n: fmt or format_of(n) for n in names}
    found = sorted({k for k in kinds.values() if k is not None})
    if not found:
        return [spec]
    if len(found) != 1:
        raise ConfigError(f"the folder {spec!r} must hold files of one format to read "
                          f"them in name order; it holds "
                          f"{', '.join(found)}")
    return [os.path.join(spec, n) for n in names if kinds[n] == found[0]]


def _check_same_columns(first: tuple[str, list[str]], later: tuple[str, list[str]]) -> None:
    (a, cols_a), (b, cols_b) = first, later
    if cols_a == cols_b:
        return
    i = next((i for i, (x, y) in enumerate(zip(cols_a, cols_b)) if x != y),
             min(len(cols_a), len(cols_b)))
    if i < len(cols_a) and i < len(cols_b):
        detail = f"column {i + 1} is {cols_b[i]!r} in {b!r} but {cols_a[i]!r} in {a!r}"
    elif i < len(cols_a):
        detail = f"{b!r} has no column {i + 1} ({cols_a[i]!r} in {a!r})"
    else:
        detail = f"{b!r} has an extra column {i + 1} ({cols_b[i]!r}) that {a!r} lacks"
    raise SchemaError(f"{b!r} does not have the columns of {a!r}: {detail}")


def open_sources(specs: list[str], fmt: str | None = None, batch_rows: int = 65536,
                 stdin: BinaryIO | None = None, follow: FollowControl | None = None,
                 header: list[str] | None = None) -> Source:
    """One source reading ``specs`` in order (``-`` is standard input).

    Parameters
    ----------
    specs
        File names, or ``-`` (at most once) for standard input; or one broker URL
        (``mqtt://``, ``mqtts://``, ``redis://``, ``rediss://``, see
        :mod:`connectors.broker_payloads`).
    fmt
        A key of ``FORMATS`` for every input; by default from each file's extension,
        and sniffed for standard input.
    batch_rows
        Most records per batch.
    stdin
        Stream read for ``-`` instead of ``sys.stdin.buffer`` (bytes).
    follow
        Follow mode: the last file is read on as it grows, is rotated or truncated,
        until ``follow`` says stop (see :mod:`connectors.follow`).
    header
        Column names to use instead of each CSV or TSV file's header line (which is still
        read and skipped); they must be as many as its fields and all different.

    Raises
    ------
    ConfigError
        No input, an unknown format, ``-`` twice, or a file whose format cannot be told.
    InputError
        A file cannot be read ("cannot read 'x.csv': No such file or directory").
    """
    specs = list(specs)
    if not specs:
        raise ConfigError("give at least one source (a file name, or - for standard input)")
    if header is not None:
        repeated = sorted({n for n in header if header.count(n) > 1})
        if repeated or not all(header):
            raise ConfigError(f"--header must name every column once, got "
                              f"{', '.join(map(repr, header))}")
    broker = _open_broker(specs, batch_rows)
    if broker is not None:
        if header is not None:
            raise ConfigError("--header names the columns of files; a broker source "
                              "takes columns=... in its URL")
        if follow is not None:
            raise ConfigError("follow mode is for files; a broker source is live already")
        return broker
    if fmt is not None and fmt not in FORMATS:
        raise ConfigError(f"format must be one of {', '.join(sorted(FORMATS))}, got {fmt!r}")
    batch_rows = require_int("batch rows", batch_rows, 1)
    specs = [name for spec in specs for name in _folder_files(spec, fmt)]
    if specs.count(STDIN) > 1:
        raise ConfigError("standard input ('-') can be given only once")
    if follow is not None and specs[-1] == STDIN:
        raise ConfigError("follow mode reads a growing file; standard input is read to "
                          "its end anyway, give a file name")
    inputs = []
    for i, spec in enumerate(specs):
        if spec == STDIN:
            inputs.append(_StdinInput(stdin, fmt))
            continue
        name = fmt or format_of(spec)
        if name is None:
            raise ConfigError(f"cannot tell the format of {spec!r} from its name; "
                              f"give one of {', '.join(sorted(FORMATS))}")
        followed = follow is not None and i == len(specs) - 1
        try:
            with open(spec, "rb") as probe:
                packed = probe.read(2) == _GZIP_MAGIC
        except FileNotFoundError as exc:
            if followed:  # a followed file may appear later
                inputs.append(_FollowedInput(spec, name, follow))
                continue
            raise input_error(spec, exc) from exc
        except OSError as exc:
            raise input_error(spec, exc) from exc
        if followed:
            if packed:
                raise ConfigError(f"follow mode reads plain text as it grows; {spec!r} is "
                                  f"gzip-compressed")
            inputs.append(_FollowedInput(spec, name, follow))
        else:
            inputs.append(_FileInput(spec, name))
    for item in inputs:
        item.names = header
    return ChainedSource(inputs, batch_rows)


def _open_broker(specs: list[str], batch_rows: int) -> Source | None:
    """The broker source when ``specs`` names one (the broker module is imported only
    when a spec looks like a URL)."""
    if not any("://" in spec for spec in specs):
        return None
    from .brokers import open_broker_sources

    return open_broker_sources(specs, batch_rows)
