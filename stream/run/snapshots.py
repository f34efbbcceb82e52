"""A directory of rule snapshots that operators read and diff over time.

Inside: :class:`SnapshotStore`. The directory holds, per snapshot ``n``::

    snapshot-000001.json   the payload plus sequence, records and written_at
    snapshot-000001.txt    the text rendering, as given
    index.json             {"format": "sapwood-snapshot-index", "version": 1,
                            "snapshots": [entry, ...]}   (oldest first)

An index entry holds ``sequence``, ``records``, ``written_at`` (ISO 8601, UTC), ``json``
and ``text`` (file names in the directory) and, if the payload carried one, its
``headline`` dict (metrics, rule count), so a listing needs only the index.

Order of writing, so that a reader following the index never meets a missing or partial
file: the snapshot's JSON, then its text, then the index, each replaced atomically
(:mod:`stream.run.atomic`); retention first drops old entries from the index, then deletes
their files. A crash between steps leaves at worst a snapshot the index does not list; the
next :meth:`SnapshotStore.write` (or :meth:`SnapshotStore.rebuild_index`) adopts it.
Other files in the directory are left alone. One writer per directory: there is no lock.

Retention keeps the newest ``keep`` snapshots; with ``history`` it also keeps a thinned
record of older ones (:func:`thin_history`: the older a snapshot, the sparser), so a long
run keeps its distant past in about ``keep / 2`` snapshots per doubling of its length.
:class:`SnapshotSchedule` says when a run should take the next snapshot: every N records
and/or every T seconds.
"""

from __future__ import annotations

import json
import math
import os
import re
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from stream.checks import require_int
from stream.errors import ConfigError, ModelFileError

from .atomic import write_atomic
from .model_file import json_problem

INDEX_NAME = "index.json"
INDEX_FORMAT = "sapwood-snapshot-index"
INDEX_VERSION = 1

_SNAPSHOT_FILE = re.compile(r"snapshot-(\d{6,})\.json\Z")
_RESERVED = ("sequence", "records", "written_at")


class SnapshotStore:
    """Numbered snapshots in one directory, with an index and optional retention.

    Parameters
    ----------
    directory
        Where the snapshots live; created on the first write.
    keep
        Keep only the newest ``keep`` snapshots (None keeps all).
    history
        With ``keep``: also keep older snapshots, thinned (see :func:`thin_history`).

    Examples
    --------
    >>> import tempfile
    >>> scratch = tempfile.TemporaryDirectory()
    >>> store = SnapshotStore(scratch.name, keep=10)
    >>> store.write(5000, {"headline": {"rules": 3}}, "IF ...", when=1.7e9)["json"]
    'snapshot-000001.json'
    >>> [e["sequence"] for e in store.entries()]
    [1]
    >>> scratch.cleanup()
    """

    def __init__(self, directory: str | os.PathLike, keep: int | None = None,
                 history: bool = False) -> None:
        self.directory = Path(directory)
        self.keep = None if keep is None else require_int("snapshot retention (keep)", keep, 1)
        if history and self.keep is None:
            raise ConfigError("a thinned snapshot history needs a number of snapshots to "
                              "keep, got none")
        self.history = bool(history)

    def write(self, records: int, payload: dict, text: str, when: float) -> dict:
        """Write the next snapshot and return its index entry.

        Parameters
        ----------
        records
            Records seen when the snapshot was taken.
        payload
            JSON-ready content (rules, metrics, ...); must not carry ``sequence``,
            ``records`` or ``written_at``, which the store sets. ``payload["headline"]``,
            if present, must be a dict and is copied into the index.
        text
            The text rendering, written as given (UTF-8).
        when
            Seconds since 1970-01-01 UTC (the caller's clock).
        """
        records = require_int("snapshot record count", records, 0)
        written_at = _iso_utc(when)
        _check_payload(payload, text)

        self.directory.mkdir(parents=True, exist_ok=True)
        entries, highest = self._reconcile()
        sequence = highest + 1
        document = {"sequence": sequence, "records": records, "written_at": written_at, **payload}
        write_atomic(self.directory / _json_name(sequence), _dump(document))
        write_atomic(self.directory / _text_name(sequence), text)

        entry = _entry(sequence, records, written_at, payload.get("headline"), has_text=True)
        entries.append(entry)
        expired: list[dict] = []
        if self.keep is not None and len(entries) > self.keep:
            if self.history:
                kept = set(thin_history([e["sequence"] for e in entries], self.keep))
                expired = [e for e in entries if e["sequence"] not in kept]
                entries = [e for e in entries if e["sequence"] in kept]
            else:
                expired, entries = entries[:-self.keep], entries[-self.keep:]
        self._write_index(entries)
        # Only after the index stops naming them, so index readers never meet a gap.
        for old in expired:
            (self.directory / _json_name(old["sequence"])).unlink(missing_ok=True)
            (self.directory / _text_name(old["sequence"])).unlink(missing_ok=True)
        return entry

    def entries(self) -> list[dict]:
        """Return the index entries, oldest first (rebuilt from the files if the index is missing).

        Raises
        ------
        ModelFileError
            The directory does not exist, or the index (or a snapshot read to rebuild
            it) is corrupt.
        """
        self._require_directory()
        listed = self._read_index()
        return self._scan() if listed is None else listed

    def load(self, sequence: int) -> dict:
        """Return snapshot ``sequence`` as written (payload plus sequence, records, written_at)."""
        sequence = require_int("snapshot sequence", sequence, 1)
        self._require_directory()
        return self._load_document(sequence)

    def load_text(self, sequence: int) -> str:
        """Return the text rendering of snapshot ``sequence``."""
        sequence = require_int("snapshot sequence", sequence, 1)
        path = self.directory / _text_name(sequence)
        try:
            return path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise self._missing(sequence) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ModelFileError(f"{str(path)!r} cannot be read: {exc}") from exc

    def latest(self, n: int = 1) -> list[dict]:
        """Return the newest ``n`` snapshots (fewer if fewer exist), oldest first."""
        n = require_int("number of snapshots", n, 1)
        return [self.load(entry["sequence"]) for entry in self.entries()[-n:]]

    def rebuild_index(self) -> list[dict]:
        """Rewrite the index from the snapshot files present and return its entries."""
        self._require_directory()
        entries = self._scan()
        self._write_index(entries)
        return entries

    # -- internals -------------------------------------------------------------------

    def _reconcile(self) -> tuple[list[dict], int]:
        """Entries whose files exist (index order), plus snapshots the index missed.

        Also returns the highest sequence number known from the index or the files, so
        numbering never goes back even if files were removed by hand.
        """
        listed = self._read_index()
        present = self._sequences_present()
        if listed is None:
            kept = []
        else:
            kept = [e for e in listed if e["sequence"] in present]
        known = {e["sequence"] for e in kept}
        adopted = [self._entry_from_file(s) for s in sorted(present - known)]
        highest = max([e["sequence"] for e in listed or []] + list(present), default=0)
        return sorted(kept + adopted, key=lambda e: e["sequence"]), highest

    def _scan(self) -> list[dict]:
        return [self._entry_from_file(s) for s in sorted(self._sequences_present())]

    def sequences_on_disk(self) -> set[int]:
        """Numbers of the snapshot files in the directory, whatever the index says."""
        return self._sequences_present()

    def _sequences_present(self) -> set[int]:
        found = set()
        for name in os.listdir(self.directory):
            match = _SNAPSHOT_FILE.match(name)
            # Only canonical names: 'snapshot-0000001.json' is someone else's file.
            if match and name == _json_name(int(match.group(1))) and int(match.group(1)) >= 1:
                found.add(int(match.group(1)))
        return found

    def _entry_from_file(self, sequence: int) -> dict:
        document = self._load_document(sequence)
        path = self.directory / _json_name(sequence)
        records, written_at = document.get("records"), document.get("written_at")
        headline = document.get("headline")
        if type(records) is not int or not isinstance(written_at, str) or not (
                headline is None or isinstance(headline, dict)):
            raise ModelFileError(f"{str(path)!r} is corrupt: records, written_at or "
                                 f"headline is missing or malformed")
        has_text = (self.directory / _text_name(sequence)).exists()
        return _entry(sequence, records, written_at, headline, has_text)

    def _load_document(self, sequence: int) -> dict:
        path = self.directory / _json_name(sequence)
        try:
            raw = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise self._missing(sequence) from None
        except UnicodeDecodeError:
            raise ModelFileError(f"{str(path)!r} is corrupt: not UTF-8 text") from None
        except OSError as exc:
            raise ModelFileError(f"{str(path)!r} cannot be read: {exc.strerror or exc}") from exc
        try:
            document = json.loads(raw)
        except (ValueError, RecursionError) as exc:
            raise ModelFileError(f"{str(path)!r} is corrupt: not valid JSON ({exc})") from None
        if not isinstance(document, dict) or document.get("sequence") != sequence:
            raise ModelFileError(f"{str(path)!r} is corrupt: it does not hold snapshot {sequence}")
        return document

    def _read_index(self) -> list[dict] | None:
        path = self.directory / INDEX_NAME
        hint = "; delete it and sapwood rebuilds it from the snapshot files"
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return None
        except (ValueError, RecursionError):
            raise ModelFileError(f"{str(path)!r} is corrupt: not valid JSON{hint}") from None
        except OSError as exc:
            raise ModelFileError(f"{str(path)!r} cannot be read: {exc.strerror or exc}") from exc
        if not isinstance(data, dict) or data.get("format") != INDEX_FORMAT:
            raise ModelFileError(f"{str(path)!r} is not a sapwood snapshot index{hint}")
        version = data.get("version")
        if type(version) is int and version > INDEX_VERSION:
            raise ModelFileError(f"{str(path)!r} is in index version {version}, newer than "
                                 f"this sapwood reads (up to {INDEX_VERSION})")
        entries = data.get("snapshots")
        if version != INDEX_VERSION or not isinstance(entries, list) or not all(
                _valid_entry(e) for e in entries):
            raise ModelFileError(f"{str(path)!r} is corrupt: malformed entries{hint}")
        return sorted(entries, key=lambda e: e["sequence"])

    def _write_index(self, entries: list[dict]) -> None:
        index = {"format": INDEX_FORMAT, "version": INDEX_VERSION, "snapshots": entries}
        write_atomic(self.directory / INDEX_NAME, _dump(index))

    def _require_directory(self) -> None:
        if not self.directory.is_dir():
            raise ModelFileError(f"snapshot directory {str(self.directory)!r} does not exist")

    def _missing(self, sequence: int) -> ModelFileError:
        return ModelFileError(f"snapshot {sequence} is not in {str(self.directory)!r} "
                              f"(never written, or removed by retention)")


def thin_history(sequences: list[int], keep: int) -> list[int]:
    """The sequences a thinned history keeps, oldest first.

    The newest ``keep`` stay. An older snapshot of age ``a`` (snapshots written after it)
    stays if its sequence is a multiple of ``2 ** (floor(log2(a // keep)) + 1)``: every
    2nd for ages ``keep..2*keep-1``, every 4th up to ``4*keep-1``, and so on. The spacing
    only grows with age and each spacing divides the next, so a snapshot dropped once
    would be dropped by every later write too: thinning never needs a file it deleted.

    >>> thin_history(list(range(1, 21)), 4)
    [8, 12, 14, 16, 17, 18, 19, 20]
    """
    keep = require_int("snapshot retention (keep)", keep, 1)
    if not sequences:
        return []
    newest = max(sequences)
    kept = []
    for sequence in sorted(sequences):
        age = newest - sequence
        if age < keep or sequence % (2 ** ((age // keep).bit_length())) == 0:
            kept.append(sequence)
    return kept


class SnapshotSchedule:
    """When a run takes its next snapshot: every ``every_records`` records and/or every
    ``every_seconds`` seconds (0 turns either off).

    Record-based snapshots fall on exact multiples of ``every_records`` (the engine cuts
    batches there); time-based ones are checked where the run stops between batches, so
    they land on the first batch boundary after the interval has passed.

    Parameters
    ----------
    every_records, every_seconds
        Intervals; at least one must be set.
    clock
        Seconds from any fixed origin (``time.monotonic`` by default; tests pass a fake).
    """

    def __init__(self, every_records: int = 0, every_seconds: float = 0.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.every_records = require_int("snapshot interval", every_records, 0)
        if isinstance(every_seconds, bool) or not isinstance(every_seconds, (int, float)) \
                or not math.isfinite(every_seconds) or every_seconds < 0:
            raise ConfigError(f"snapshot time interval must be a number of seconds >= 0, "
                              f"got {every_seconds!r}")
        if not self.every_records and not every_seconds:
            raise ConfigError("a snapshot schedule needs a record interval or a time "
                              "interval, got neither")
        self.every_seconds = float(every_seconds)
        self.clock = clock
        self.last_records = 0
        self.last_time = clock()

    def records_to_boundary(self, records: int) -> int | None:
        """Records until the next record-based snapshot (None without a record interval)."""
        if not self.every_records:
            return None
        return self.every_records - records % self.every_records

    def due(self, records: int) -> bool:
        """True when a snapshot should be taken now, at ``records`` records seen."""
        if records == self.last_records:
            return False
        if self.every_records and records % self.every_records == 0:
            return True
        return bool(self.every_seconds) and self.clock() - self.last_time >= self.every_seconds

    def taken(self, records: int) -> None:
        """Record that a snapshot was just taken at ``records`` records."""
        self.last_records = records
        self.last_time = self.clock()


def _json_name(sequence: int) -> str:
    return f"snapshot-{sequence:06d}.json"


def _text_name(sequence: int) -> str:
    return f"snapshot-{sequence:06d}.txt"


def _entry(sequence: int, records: int, written_at: str, headline: dict | None,
           has_text: bool) -> dict:
    entry = {"sequence": sequence, "records": records, "written_at": written_at,
             "json": _json_name(sequence), "text": _text_name(sequence) if has_text else None}
    if headline is not None:
        entry["headline"] = headline
    return entry


def _valid_entry(entry: Any) -> bool:
    return (isinstance(entry, dict) and type(entry.get("sequence")) is int
            and entry["sequence"] >= 1 and type(entry.get("records")) is int
            and isinstance(entry.get("written_at"), str))


def _check_payload(payload: Any, text: Any) -> None:
    if not isinstance(payload, dict):
        raise ConfigError(f"snapshot payload must be a dict, got {type(payload).__name__}")
    for key in _RESERVED:
        if key in payload:
            raise ConfigError(f"snapshot payload must not carry {key!r} (the store sets it), "
                              f"got {payload[key]!r}")
    headline = payload.get("headline")
    if headline is not None and not isinstance(headline, dict):
        raise ConfigError(f"snapshot headline must be a dict, got {headline!r}")
    problem = json_problem(payload, "snapshot payload")
    if problem:
        raise ConfigError(problem)
    if not isinstance(text, str):
        raise ConfigError(f"snapshot text must be a str, got {type(text).__name__}")


def _iso_utc(when: Any) -> str:
    """ISO 8601 in UTC with milliseconds and a 'Z' suffix, e.g. 2023-11-14T22:13:20.000Z."""
    if isinstance(when, bool) or not isinstance(when, (int, float)) or not math.isfinite(when):
        raise ConfigError(f"snapshot time must be a finite number of seconds since "
                          f"1970-01-01 UTC, got {when!r}")
    try:
        moment = datetime.fromtimestamp(when, tz=timezone.utc)
    except (OverflowError, OSError, ValueError):
        raise ConfigError(f"snapshot time must be a date between years 1 and 9999, "
                          f"got {when!r}") from None
    return moment.isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _dump(value: Any) -> str:
    return json.dumps(value, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
