"""CSV and TSV as record batches: pandas' C parser on byte chunks, exact line numbers.

Inside: :class:`LineStream` (a byte stream handed out in runs of whole lines, shared with
the JSON Lines reader), the record scanner and :class:`CsvReader` / :class:`TsvReader`.

The first non-blank record is the header (required). Fields are split as RFC 4180 says
(quotes around a field, ``""`` inside quotes for one quote; a quote inside an unquoted
field is literal, as pandas reads it). Values are converted by pandas' defaults only:
missing markers become NaN, a numeric column holding one bad value stays text (the
encoder reports it). Bytes that are not UTF-8 become U+FFFD instead of stopping the run.

How bad lines are found (a measured choice, pandas 3.1)
-------------------------------------------------------
pandas' C engine with ``on_bad_lines='warn'`` reports only rows with too *many* fields
("Skipping line 4: expected 3 fields, saw 4"); rows with too few are silently padded
with NaN, the line numbers it prints skip newlines inside quoted fields, and nothing maps
the rows it returns back to lines once blank lines are skipped. A callable
``on_bad_lines`` needs the python engine, 14 times slower here (200k rows x 9 columns:
0.87 s against 0.061 s). So this reader cuts the stream into chunks of whole lines
itself and, per chunk:

* fast path (no quote character, line breaks LF or CRLF): the first line has exactly
  the header's field count (pandas would otherwise take a longer first row as the width
  and truncate every row with a mere warning); pandas parses the chunk with
  ``on_bad_lines='error'`` (so no row has too many fields); the row count must equal
  the line count (no blank line was skipped), so row i is line ``first + i``; and the
  chunk's delimiter count must be exactly (columns - 1) x rows, which with no row too
  long means no row is too short. The checks cost two byte counts per chunk.
* exact path, for any chunk failing those checks: a compiled scanner that follows the
  C tokenizer's states records each record's byte span, first physical line and field
  count; records with the wrong count become :class:`Reject`, the rest go to pandas.

Chunk boundaries are settled in stream order; the parsing of up to ``PARSE_THREADS``
chunks overlaps on a thread pool (pandas' tokenizer and converters release the GIL, the
same way pandas 3.1 parallelises ``read_csv`` of a local file), and batches come out in
stream order.

Line numbers are physical (1-based, the header's line included, newlines inside quoted
fields counted; a lone CR counts as a line break, as pandas treats it). A record with an
unclosed quote is cut at the end of its first line and rejected.

Limitations: chunks are cut at LF, so a file whose only line breaks are lone CRs is read
as one piece and fails with InputError beyond ``MAX_RECORD_BYTES``, as does any line
longer than that. A chunk holding any quote character takes the exact path, whose scan
runs in stream order before parsing: a file with quoted text fields reads at about half
of pandas' own speed (measured, 1M rows, pandas 3.1), an unquoted one at 0.8-1.0. No
comment lines, escape characters or other quote characters: RFC 4180 has none.
"""

from __future__ import annotations

import csv
import functools
import io
import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from typing import BinaryIO, Callable, Iterator

import numpy as np
import pandas as pd

from stream.errors import InputError
from stream.jit import njit

from .base import ColumnHints, RawBatch, Reject

MAX_RECORD_BYTES = 1 << 25
"""Largest record (32 MiB) the readers hold while looking for its end."""

MAX_TEXT_CHARS = 200
"""Raw text of a bad record is cut to this many characters in its Reject."""

MARK_BYTES = 64
"""Bytes just before a position kept with it, to tell on resuming that the file there
still holds what was read (not a rewritten file with the same name and inode)."""

_BOM = b"\xef\xbb\xbf"
_MIN_BLOCK = 1 << 12
_MAX_BLOCK = 1 << 24
_FIRST_GUESS_BYTES_PER_LINE = 64
_QUOTE = ord('"')
_UNCLOSED = 1

_CPUS = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else \
    (os.cpu_count() or 1)
PARSE_THREADS = min(4, max(1, _CPUS - 1))
"""Background threads parsing chunks of a delimited file: at most 4, and one CPU fewer
than there are, as the learner runs beside the reader (measured on 2 CPUs, 300k rows of
15 features: 2 parse threads 690k rec/s, 1 thread 830k)."""
FIRST_BATCH_ROWS = 16_384
"""Records of the first batch at most: the learner waits for the first batch, so a small
one lets it start sooner (records learned are the same at any batch size). Each later
batch may hold twice as many as the one before, up to ``batch_rows``, so the parser
stays ahead of the learner while the batches grow."""


def raw_text(data: bytes) -> str:
    """Record bytes as text for a Reject, cut to ``MAX_TEXT_CHARS``."""
    return data.decode("utf-8", "replace")[:MAX_TEXT_CHARS]


def _short_read_means_pause(stream: BinaryIO) -> bool:
    return bool(getattr(stream, "live", False))


class LineStream:
    """A binary stream read in blocks, handed out as runs of whole lines.

    ``pending`` holds bytes read but not yet handed out; ``line`` is the physical line
    the next bytes handed out start on (callers advance it). A leading UTF-8 byte order
    mark is dropped (only at offset 0).

    Parameters
    ----------
    stream
        Anything with ``read(n)``. A stream with a true ``live`` attribute may return
        fewer bytes than asked while more will come; the reader then works on what it
        has instead of waiting (standard input from a live producer).
    offset, line
        Where ``stream`` already stands: its byte offset and the physical line that
        starts there (a resumed stream).
    """

    def __init__(self, stream: BinaryIO, offset: int = 0, line: int = 1) -> None:
        self._stream = stream
        self.live = _short_read_means_pause(stream)
        self.pending = b""
        self.eof = False
        self.line = line
        self._consumed = offset
        self._at_start = offset == 0

    @property
    def offset(self) -> int:
        """Byte offset in the stream of the first byte not handed out yet (a checkpoint
        resumes there); the byte order mark counts."""
        return self._consumed - len(self.pending)

    def _raw_read(self, size: int) -> bytes:
        data = self._stream.read(size)
        self._consumed += len(data)
        return data

    def _read(self, size: int) -> bytes:
        data = self._raw_read(size)
        if self._at_start and data:
            while len(data) < len(_BOM):
                more = self._raw_read(len(_BOM) - len(data))
                if not more:
                    break
                data += more
            self._at_start = False
            if data.startswith(_BOM):
                data = data[len(_BOM):] or self._raw_read(size)
        if not data:
            self.eof = True
        return data

    def _read_parts(self, size: int, more: bool = False) -> list[bytes]:
        parts = [self.pending] if self.pending else []
        have = len(self.pending)
        if self.live and not more and b"\n" in self.pending:
            return parts  # whole lines are waiting: hand them out before blocking again
        while have < size and not self.eof:
            data = self._read(size - have)
            if not data:
                break
            parts.append(data)
            have += len(data)
            if self.live and have < size:
                break
        return parts

    def fill(self, size: int) -> None:
        """Read until ``size`` bytes are pending, the stream ends or live input pauses."""
        parts = self._read_parts(size, more=True)
        self.pending = b"".join(parts)

    def take(self, size: int, more: bool = False) -> tuple[bytes, bool]:
        """Hand out about ``size`` bytes of whole lines (all that is left at EOF).

        Returns (chunk, final): ``final`` when the chunk ends the stream; an empty,
        non-final chunk when no line is complete yet (ask again with a larger size).
        ``more`` reads even when whole lines are pending (the last record handed out
        went on past them). Copies each byte once.
        """
        parts = self._read_parts(size, more)
        if self.eof:
            self.pending = b""
            return (parts[0] if len(parts) == 1 else b"".join(parts)), True
        for i in range(len(parts) - 1, -1, -1):
            cut = parts[i].rfind(b"\n") + 1
            if cut:
                last = parts[i]
                if i == 0 and cut == len(last):
                    chunk = last
                else:
                    chunk = b"".join(parts[:i] + [memoryview(last)[:cut]])
                self.pending = b"".join([last[cut:]] + parts[i + 1:])
                return chunk, False
        self.pending = b"".join(parts)
        return b"", False

    def give_back(self, data: bytes) -> None:
        """Put bytes handed out but not used back in front of the pending ones."""
        if data:
            self.pending = data + self.pending if self.pending else data

    def consume(self, size: int, lines: int) -> None:
        """Drop ``size`` pending bytes spanning ``lines`` lines."""
        self.pending = self.pending[size:]
        self.line += lines


# ---------------------------------------------------------------------------------------
# the record scanner (exact path)
# ---------------------------------------------------------------------------------------

@njit(nogil=True)
def _scan_records(buf, pos, final, delim, quote, line, cap,
                  starts, ends, nexts, lines, fields):  # pragma: no cover - compiled
    """Split ``buf[pos:]`` into records, mirroring pandas' C tokenizer.

    Writes up to ``cap`` records (byte start, content end, start of the next record,
    first physical line, field count) and skips blank and whitespace-only lines.
    Returns (position after the last record, records written, next line, status); status
    is 1 when ``final`` and the record at the returned position never closes its quote.
    """
    n = buf.shape[0]
    k = 0
    while pos < n and k < cap:
        j = pos
        while j < n and (buf[j] == 32 or buf[j] == 9) and buf[j] != delim:
            j += 1
        if j == n:
            if final:
                pos = n
            return pos, k, line, 0
        c = buf[j]
        if c == 10 or c == 13:  # blank line
            if c == 13:
                if j + 1 < n:
                    pos = j + 2 if buf[j + 1] == 10 else j + 1
                elif final:
                    pos = j + 1
                else:
                    return pos, k, line, 0
            else:
                pos = j + 1
            line += 1
            continue
        p = pos
        nf = 1
        state = 0  # 0 start of field, 1 in field, 2 in quoted field, 3 quote in quoted field
        inner = 0  # line breaks inside quoted fields
        end = -1
        nxt = -1
        while p < n:
            c = buf[p]
            if state == 2:
                if c == quote:
                    state = 3
                elif c == 10:
                    inner += 1
                elif c == 13 and p + 1 < n and buf[p + 1] != 10:
                    inner += 1
                p += 1
                continue
            if c == 10:
                end = p
                nxt = p + 1
                break
            if c == 13:
                if p + 1 < n:
                    nxt = p + 2 if buf[p + 1] == 10 else p + 1
                elif final:
                    nxt = p + 1
                else:
                    break
                end = p
                break
            if c == delim:
                nf += 1
                state = 0
            elif c == quote:
                if state == 0 or state == 3:
                    state = 2
            else:
                state = 1
            p += 1
        if end < 0:
            if final and state != 2:
                end = n
                nxt = n
            else:
                return pos, k, line, 1 if (final and state == 2) else 0
        starts[k] = pos
        ends[k] = end
        nexts[k] = nxt
        lines[k] = line
        fields[k] = nf
        k += 1
        line += 1 + inner
        pos = nxt
    return pos, k, line, 0


@njit(nogil=True)
def _gather(buf, starts, stops, out):  # pragma: no cover - compiled
    """Copy the byte ranges [starts[i], stops[i]) of ``buf`` one after another into out."""
    o = 0
    for i in range(starts.shape[0]):
        size = stops[i] - starts[i]
        out[o:o + size] = buf[starts[i]:stops[i]]
        o += size
    return o


def _crlf_only(chunk: bytes) -> bool:
    """True when every CR in the bytes starts a CRLF (a lone CR also ends a line).

    ``bytes.count`` scans without the temporary arrays a numpy comparison makes."""
    return chunk.count(b"\r") == chunk.count(b"\r\n")


class _Records:
    """Scratch arrays the scanner fills, reused between chunks."""

    def __init__(self, cap: int) -> None:
        self.cap = cap
        self.starts = np.empty(cap, np.int64)
        self.ends = np.empty(cap, np.int64)
        self.nexts = np.empty(cap, np.int64)
        self.lines = np.empty(cap, np.int64)
        self.fields = np.empty(cap, np.int64)

    def scan(self, buf: np.ndarray, final: bool, delim: int, line: int,
             cap: int | None = None) -> tuple[int, int, int, int]:
        return _scan_records(buf, 0, final, delim, _QUOTE, line, cap or self.cap,
                             self.starts, self.ends, self.nexts, self.lines, self.fields)


# ---------------------------------------------------------------------------------------
# the reader
# ---------------------------------------------------------------------------------------

class DelimitedReader:
    """Records of one delimited text stream (header required), in batches.

    Parameters
    ----------
    opener
        Returns the binary stream, already decompressed; called on first use.
    origin
        Name used in batches and rejects (file name, or ``-`` for standard input).
    batch_rows
        Most records per batch.
    threads
        Background threads parsing chunks ahead of the consumer (pandas' parser
        releases the GIL); 0 parses in the consumer's thread. Live input is always
        parsed in the consumer's thread, so no batch waits for a later read.
    resume
        A position of an earlier batch (``offset``, ``line``, ``mark``, ``columns``,
        ``header_line``): the stream ``opener`` returns already stands at ``offset``,
        the header is taken from here and not read again.
    known_columns
        Columns of an earlier file of the same feed (a followed file that was rotated
        or truncated): if the first record names exactly these columns it is the
        header, otherwise the file has no header and all its lines are records.
    hints
        What the run settled about the columns: those it reads as labels are parsed
        straight into pandas Categoricals from then on (pandas numbers the text as it
        parses it: 20-25 % less parsing and no numbering later, on a batch with three
        text columns of nine; measured, pandas 3.1).

    Each batch carries ``position``: ``offset`` (of the next unread byte), ``line``
    (the physical line that starts there), ``mark`` (hex of up to ``MARK_BYTES``
    bytes before the offset), ``columns`` and ``header_line``.
    """

    delimiter = ","
    extensions: tuple[str, ...] = ()

    def __init__(self, opener: Callable[[], BinaryIO], origin: str,
                 batch_rows: int = 65536, threads: int = PARSE_THREADS,
                 resume: dict | None = None, known_columns: list[str] | None = None,
                 names: list[str] | None = None, hints: ColumnHints | None = None) -> None:
        self.name = origin
        self._hints = hints
        self._names = list(names) if names is not None else None
        self._resume = resume
        self._known = list(known_columns) if known_columns is not None else None
        self._mark = b""
        self._opener = opener
        self._batch_rows = int(batch_rows)
        self._threads = max(0, int(threads))
        self._stream: BinaryIO | None = None
        self._lines: LineStream | None = None
        self._columns: list[str] | None = None
        self._started = False
        self._records = _Records(self._batch_rows)
        self._delim = ord(self.delimiter)
        self._delim_bytes = self.delimiter.encode()
        self._bytes_per_line = float(_FIRST_GUESS_BYTES_PER_LINE)
        self.header_line: int | None = None

    @property
    def columns(self) -> list[str] | None:
        """Column names from the header; None for an empty stream. Reads the header."""
        self._start()
        return self._columns

    def close(self) -> None:
        if self._stream is not None:
            self._stream.close()
            self._stream = None

    # -- header ------------------------------------------------------------------------

    def _start(self) -> None:
        if self._started:
            return
        self._started = True
        self._stream = self._opener()
        if self._resume is not None:
            at = self._resume
            self._lines = LineStream(self._stream, int(at["offset"]), int(at["line"]))
            self._columns = [str(c) for c in at["columns"]]
            self.header_line = at.get("header_line")
            self._mark = bytes.fromhex(at.get("mark", ""))
            return
        src = self._lines = LineStream(self._stream)
        src.fill(_MIN_BLOCK * 16)
        while True:
            if not src.pending and src.eof:
                return  # empty stream: no header, no records
            buf = np.frombuffer(src.pending, np.uint8)
            pos, k, next_line, status = self._records.scan(buf, src.eof, self._delim,
                                                          src.line, cap=1)
            if k == 1:
                break
            if src.eof and status != _UNCLOSED:
                src.consume(pos, next_line - src.line)  # only blank lines
                return
            if status == _UNCLOSED or len(src.pending) > MAX_RECORD_BYTES:
                raise InputError(f"cannot read {self.name!r}: the header on line "
                                 f"{next_line} has an unclosed quote")
            src.fill(2 * len(src.pending) + _MIN_BLOCK)
        rec = self._records
        header = src.pending[int(rec.starts[0]):int(rec.ends[0])]
        names = pd.read_csv(io.BytesIO(header), sep=self.delimiter, nrows=0,
                            index_col=False, encoding_errors="replace").columns
        if self._known is not None:
            if [str(c) for c in names] != self._known or len(names) != int(rec.fields[0]):
                # no header: the first line is a record under the feed's columns
                self._columns = list(self._known)
                skipped = int(rec.starts[0])
                self._note_used(src.pending[:skipped])
                src.consume(skipped, int(rec.lines[0]) - src.line)
                return
        elif len(names) != int(rec.fields[0]):
            raise InputError(f"cannot read {self.name!r}: the header on line "
                             f"{int(rec.lines[0])} could not be split into fields")
        if self._names is not None:        # the user names the columns (--header)
            if len(self._names) != len(names):
                raise InputError(f"cannot read {self.name!r}: --header gives "
                                 f"{len(self._names)} names but the header on line "
                                 f"{int(rec.lines[0])} has {len(names)} fields")
            names = self._names
        else:
            _refuse_repeated_names(header, self.delimiter, self.name, int(rec.lines[0]))
        self._columns = [str(c) for c in names]
        self.header_line = int(rec.lines[0])
        self._note_used(src.pending[:int(rec.nexts[0])])
        src.consume(int(rec.nexts[0]), next_line - src.line)

    def _note_used(self, data) -> None:
        """Keep the last ``MARK_BYTES`` bytes handed out (the mark of the next position)."""
        if len(data) >= MARK_BYTES:
            self._mark = bytes(data[len(data) - MARK_BYTES:])
        elif len(data):
            self._mark = (self._mark + bytes(data))[-MARK_BYTES:]

    def _position(self) -> dict:
        src = self._lines
        return {"offset": src.offset, "line": src.line, "mark": self._mark.hex(),
                "columns": list(self._columns), "header_line": self.header_line}

    # -- batches -----------------------------------------------------------------------

    def batches(self) -> Iterator[RawBatch]:
        """Yield batches of at most ``batch_rows`` records until the stream ends."""
        self._start()
        if self._columns is None:
            return
        if self._threads == 0 or self._lines.live:
            for job in self._jobs():
                batch = job()
                if batch is not None:
                    yield batch
            return
        # Chunk boundaries are settled here, in order; parsing runs on a small pool and
        # batches come back in stream order. Finished batches are handed out at once.
        with ThreadPoolExecutor(self._threads, thread_name_prefix="sapwood-parse") as pool:
            pending: deque = deque()
            try:
                for job in self._jobs():
                    pending.append(pool.submit(job))
                    while pending and (len(pending) > self._threads + 1 or pending[0].done()):
                        batch = pending.popleft().result()
                        if batch is not None:
                            yield batch
                while pending:
                    batch = pending.popleft().result()
                    if batch is not None:
                        yield batch
            finally:
                for future in pending:
                    future.cancel()

    def _jobs(self) -> Iterator[Callable[[], RawBatch | None]]:
        """Cut the stream into chunks of whole records; yield one parse job per chunk."""
        src = self._lines
        want = 0
        rows = min(self._batch_rows, FIRST_BATCH_ROWS)   # learning starts sooner
        while True:
            target = want or int(min(max(rows * self._bytes_per_line * 0.98,
                                         _MIN_BLOCK), _MAX_BLOCK))
            chunk, final = src.take(target, more=bool(want))
            if not chunk:
                if final:
                    return
                if len(src.pending) > MAX_RECORD_BYTES:
                    raise InputError(f"cannot read {self.name!r}: line {src.line} is "
                                     f"longer than {MAX_RECORD_BYTES} bytes")
                want = 2 * len(src.pending) + _MIN_BLOCK  # one line is longer than asked
                continue
            want = 0
            first = src.line
            if b'"' not in chunk and (b"\r" not in chunk or _crlf_only(chunk)):
                # no quotes, LF or CRLF: every LF ends a record, so the boundary is known now
                # (numpy counts 3-4x faster than bytes.count, and without the GIL)
                a = np.frombuffer(chunk, np.uint8)
                breaks = int(np.count_nonzero(a == 10))
                records = breaks + (0 if chunk.endswith(b"\n") else 1)
                if records > rows:
                    end = int(np.flatnonzero(a == 10)[rows - 1]) + 1
                    src.give_back(chunk[end:])
                    chunk, breaks, records, final = chunk[:end], rows, rows, False
                src.line += breaks
                self._learn_line_size(len(chunk), breaks)
                self._note_used(chunk)
                yield functools.partial(self._plain_job, chunk, first, final, records,
                                        self._position())
                rows = min(self._batch_rows, 2 * rows)
                continue
            found = self._scan(chunk, final, first, self._records,
                               force=len(chunk) > MAX_RECORD_BYTES)
            if found is None:  # the first record goes on beyond the chunk
                src.give_back(chunk)
                want = 2 * len(chunk) + _MIN_BLOCK
                continue
            records, used, used_lines = found
            src.give_back(chunk[used:])
            src.line += used_lines
            self._learn_line_size(used, used_lines)
            self._note_used(memoryview(chunk)[:used])
            yield functools.partial(self._records_job, chunk, records, self._position())
            rows = min(self._batch_rows, 2 * rows)

    def _learn_line_size(self, used: int, lines: int) -> None:
        if lines:
            self._bytes_per_line = max(used / lines, 1.0)

    def _parse(self, data: bytes) -> pd.DataFrame:
        labels = self._hints.labels if self._hints is not None else ()
        return pd.read_csv(io.BytesIO(data), sep=self.delimiter, names=self._columns,
                           header=None, index_col=False, skip_blank_lines=True,
                           on_bad_lines="error", low_memory=False, engine="c",
                           encoding_errors="replace",
                           dtype={name: "category" for name in self._columns
                                  if name in labels} or None)

    def _empty(self) -> pd.DataFrame:
        return pd.DataFrame({name: pd.Series([], dtype=object) for name in self._columns})

    def _plain_job(self, chunk: bytes, first: int, final: bool,
                   records: int, position: dict | None = None) -> RawBatch | None:
        """Parse a chunk without quotes: the fast path, else the scanner on it."""
        fast = self._fast(chunk, first, records)
        if fast is not None:
            fast.position = position
            return fast
        found = self._scan(chunk, final, first, _Records(chunk.count(b"\n") + 1))
        if found is None or found[1] != len(chunk):  # impossible without quotes
            raise InputError(f"cannot read {self.name!r}: records from line {first} "
                             "could not be split consistently")
        return self._records_job(chunk, found[0], position)

    def _fast(self, chunk: bytes, first: int, records: int) -> RawBatch | None:
        width = len(self._columns)
        a = np.frombuffer(chunk, np.uint8)
        # pandas takes the field count of the first row as given (a longer first row
        # truncates every row, with a warning only), so that row is checked here
        head = chunk[:chunk.find(b"\n")] if b"\n" in chunk else chunk
        if head.count(self._delim_bytes) != width - 1:
            return None
        # pandas pads a row with too few fields with NaN; with no row too long (the
        # parser raises on one), the total delimiter count rules short rows out
        if int(np.count_nonzero(a == self._delim)) != (width - 1) * records:
            return None
        try:
            frame = self._parse(chunk)
        except (pd.errors.ParserError, pd.errors.EmptyDataError):
            return None
        if len(frame) != records:
            return None  # a blank line was skipped
        lines = np.arange(first, first + records, dtype=np.int64)
        return RawBatch(frame, self.name, lines, [])

    def _scan(self, chunk: bytes, final: bool, first: int, scratch: "_Records",
              force: bool = False):
        """Find the records of ``chunk`` with the scanner.

        Returns (records, bytes used, lines used), or None when the first record goes on
        past the chunk. ``records`` is (starts, ends, nexts, lines, fields, rejects).
        """
        buf = np.frombuffer(chunk, np.uint8)
        pos, k, next_line, status = scratch.scan(buf, final, self._delim, first)
        if k == 0 and (status == _UNCLOSED or force):
            # cut the runaway record at its first line break and go on after it
            end = chunk.find(b"\n", pos)
            end = len(chunk) if end < 0 else end + 1
            reject = Reject(self.name, next_line, None,
                            raw_text(chunk[pos:end].rstrip(b"\r\n")), "has an unclosed quote")
            empty = np.empty(0, np.int64)
            return (empty, empty, empty, empty, empty, [reject]), end, next_line + 1 - first
        if k == 0 and pos == 0:
            return None
        fields = scratch.fields[:k]
        good = fields == len(self._columns)
        rejects = []
        for i in np.flatnonzero(~good).tolist():
            count = int(fields[i])
            text = raw_text(chunk[int(scratch.starts[i]):int(scratch.ends[i])])
            rejects.append(Reject(self.name, int(scratch.lines[i]), None, text,
                                  f"has {count} field{'s' if count != 1 else ''}, "
                                  f"expected {len(self._columns)}"))
        # copies: the scratch arrays are reused for the next chunk while this one parses
        records = (scratch.starts[:k][good], scratch.ends[:k][good],
                   scratch.nexts[:k][good], scratch.lines[:k][good], fields[good], rejects)
        return records, pos, next_line - first

    def _records_job(self, chunk: bytes, records,
                     position: dict | None = None) -> RawBatch | None:
        """Parse the good records the scanner found; rejects ride along."""
        starts, _, nexts, lines, _, rejects = records
        kept = len(starts)
        if kept:
            out = np.empty(int((nexts - starts).sum()), np.uint8)
            _gather(np.frombuffer(chunk, np.uint8), starts, nexts, out)
            try:
                frame = self._parse(out.tobytes())
            except pd.errors.ParserError as exc:
                frame, detail = None, str(exc).strip()
            else:
                detail = f"{len(frame)} rows from {kept} records"
            if frame is None or len(frame) != kept:
                raise InputError(f"cannot read {self.name!r}: records from line "
                                 f"{int(lines[0])} could not be split consistently "
                                 f"({detail})")
        else:
            frame = self._empty()
        if not kept and not rejects:
            return None
        return RawBatch(frame, self.name, lines, rejects, position)


class CsvReader(DelimitedReader):
    """Comma-separated values (RFC 4180), header required."""

    delimiter = ","
    extensions = (".csv",)


class TsvReader(DelimitedReader):
    """Tab-separated values, header required."""

    delimiter = "\t"
    extensions = (".tsv",)


def _refuse_repeated_names(header: bytes, delimiter: str, name: str, line: int) -> None:
    """A header that names one column twice is refused: pandas would rename the second
    (``y`` -> ``y.1``), and a target or feature would silently be the wrong column."""
    text = header.decode("utf-8", "replace").lstrip("\ufeff")
    fields = next(csv.reader(io.StringIO(text), delimiter=delimiter), [])
    seen: dict[str, list[int]] = {}
    for position, field in enumerate(fields, start=1):
        seen.setdefault(field, []).append(position)
    # empty names are told apart by position ("Unnamed: 2"), as pandas names them
    repeated = {field: where for field, where in seen.items() if len(where) > 1 and field}
    if repeated:
        listed = "; ".join(f"{field!r} in columns {', '.join(map(str, where))}"
                           for field, where in repeated.items())
        raise InputError(f"cannot read {name!r}: the header on line {line} names a "
                         f"column more than once ({listed}); give each column its own "
                         f"name, in the file or with --header NAME,NAME,...")


def warm_up() -> None:
    """Load the record scanner and pandas' parser (both load lazily, some ms each)
    before a run's clock starts: a few records, one quoted, read to their end."""
    text = b'a,b\n1.5,x\n2,"y, z"\n'
    reader = CsvReader(lambda: io.BytesIO(text), "warm-up", threads=0)
    for _ in reader.batches():
        pass
    reader.close()
