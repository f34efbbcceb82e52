"""Files and standard input as one stream of record batches, with the format registry.

Inside: ``FORMATS`` (format name -> reader class; the CLI takes its choices from it),
:func:`format_of` (format from a file name), :func:`sniff_format` (format from the first
bytes of standard input), and :func:`open_sources`, which chains several inputs.

Gzip is recognised by its magic bytes (1f 8b, RFC 1952), whatever the file is called.
Files are checked for readability when the source is opened, so a typo fails at once;
they are then opened one at a time, when their turn comes.
"""

from __future__ import annotations

import gzip
import os
import select
import stat
import sys
import zlib
from typing import BinaryIO, Iterator

from stream.errors import ConfigError, InputError, SchemaError
from stream.settings import require_int

from .base import RawBatch, Source
from .delimited import CsvReader, TsvReader
from .jsonlines import JsonLinesReader

FORMATS = {
    "csv": CsvReader,
    "tsv": TsvReader,
    "jsonl": JsonLinesReader,
}
"""Format name -> reader class. A reader takes (opener, origin, batch_rows) and lists
its file name ``extensions``; adding a format is one line here."""

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
        while data and have < size and select.select([self._fd], [], [], 0)[0]:
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

class _FileInput:
    def __init__(self, path: str, fmt: str) -> None:
        self.origin = path
        self._format = fmt

    def reader(self, batch_rows: int):
        path = self.origin
        return FORMATS[self._format](lambda: _open_file(path), path, batch_rows)


class _StdinInput:
    origin = STDIN

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
        return FORMATS[fmt](lambda: ready, STDIN, batch_rows)


class ChainedSource:
    """Several inputs read one after the other, as one :class:`~connectors.base.Source`.

    Delimited inputs must share their columns; the first that differs raises SchemaError.
    """

    def __init__(self, inputs: list, batch_rows: int) -> None:
        self._inputs = inputs
        self._batch_rows = batch_rows
        self._current = None
        self.name = ", ".join(inp.origin for inp in inputs)

    def batches(self) -> Iterator[RawBatch]:
        reference: tuple[str, list[str]] | None = None
        for inp in self._inputs:
            try:
                reader = self._current = inp.reader(self._batch_rows)
                columns = reader.columns
                if columns is not None:
                    if reference is None:
                        reference = (inp.origin, columns)
                    else:
                        _check_same_columns(reference, (inp.origin, columns))
                yield from reader.batches()
            except _READ_ERRORS as exc:
                raise input_error(inp.origin, exc) from exc
            finally:
                self.close()

    def close(self) -> None:
        if self._current is not None:
            current, self._current = self._current, None
            current.close()


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
                 stdin: BinaryIO | None = None) -> Source:
    """One source reading ``specs`` in order (``-`` is standard input).

    Parameters
    ----------
    specs
        File names, or ``-`` (at most once) for standard input.
    fmt
        A key of ``FORMATS`` for every input; by default from each file's extension,
        and sniffed for standard input.
    batch_rows
        Most records per batch.
    stdin
        Stream read for ``-`` instead of ``sys.stdin.buffer`` (bytes).

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
    if fmt is not None and fmt not in FORMATS:
        raise ConfigError(f"format must be one of {', '.join(sorted(FORMATS))}, got {fmt!r}")
    batch_rows = require_int("batch rows", batch_rows, 1)
    if specs.count(STDIN) > 1:
        raise ConfigError("standard input ('-') can be given only once")
    inputs = []
    for spec in specs:
        if spec == STDIN:
            inputs.append(_StdinInput(stdin, fmt))
            continue
        name = fmt or format_of(spec)
        if name is None:
            raise ConfigError(f"cannot tell the format of {spec!r} from its name; "
                              f"give one of {', '.join(sorted(FORMATS))}")
        try:
            open(spec, "rb").close()
        except OSError as exc:
            raise input_error(spec, exc) from exc
        inputs.append(_FileInput(spec, name))
    return ChainedSource(inputs, batch_rows)
