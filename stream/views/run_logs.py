"""Reading a run's JSON-lines logs (metrics, drift events), also while the run writes them.

Inside: :class:`LogTail`, which returns the complete lines appended to a file since the
last call (a half-written last line waits for the next call), and :func:`read_metrics`
and :func:`read_events`, which read a whole log once. A missing file is an empty log:
the metrics log and the events file appear only once a run writes them.

Metrics rows are what ``sapwood learn --metrics`` writes (``records``, ``accuracy``,
``kappa``, ``kappa_m``, ``window_*``, ``fading_accuracy``, ``leaves``, ``depth``,
``time``). Drift events are objects with at least ``record``, ``time``, ``kind`` (alarm,
start, swap or drop), ``node`` and ``path`` (the conditions leading to the node, as a
list of feature/operator/value objects, or text).
"""

from __future__ import annotations

import json
import os
from typing import Any

from stream.errors import ModelFileError
from stream.rules.thresholds import format_number

EVENT_KINDS = ("alarm", "start", "swap", "drop")


class LogTail:
    """Follow a JSON-lines file: each :meth:`read` returns the objects appended since.

    Parameters
    ----------
    path
        The log file; it may not exist yet.
    what
        Name used in error messages ("metrics log", "events file").

    Notes
    -----
    Only whole lines (ending in a newline) are parsed; a line still being written is
    kept for the next call. If the file shrinks (a new run replaced it), reading starts
    again from the top and :attr:`restarted` is set.
    """

    def __init__(self, path: str | os.PathLike, what: str = "log") -> None:
        self.path = os.fspath(path)
        self.what = what
        self.offset = 0
        self.line = 0
        self.restarted = False
        self._pending = b""

    def read(self) -> list[dict]:
        """Objects from the complete lines written since the last call."""
        self.restarted = False
        try:
            size = os.path.getsize(self.path)
        except FileNotFoundError:
            return []
        except OSError as exc:
            raise ModelFileError(f"cannot read {self.what} {self.path!r}: "
                                 f"{exc.strerror or exc}") from exc
        if size < self.offset:
            self.offset, self.line, self._pending = 0, 0, b""
            self.restarted = True
        if size == self.offset:
            return []
        try:
            with open(self.path, "rb") as handle:
                handle.seek(self.offset)
                data = handle.read(size - self.offset)
        except OSError as exc:
            raise ModelFileError(f"cannot read {self.what} {self.path!r}: "
                                 f"{exc.strerror or exc}") from exc
        self.offset += len(data)
        data = self._pending + data
        complete, _, self._pending = data.rpartition(b"\n")
        if not complete and not data.endswith(b"\n"):
            return []
        rows = []
        for raw in complete.split(b"\n"):
            self.line += 1
            if not raw.strip():
                continue
            rows.append(self._parse(raw))
        return rows

    def _parse(self, raw: bytes) -> dict:
        try:
            value = json.loads(raw)
        except (ValueError, RecursionError):
            shown = raw[:60].decode("utf-8", "replace")
            raise ModelFileError(f"{self.path} line {self.line}: {shown!r} is not a JSON "
                                 f"object") from None
        if not isinstance(value, dict):
            raise ModelFileError(f"{self.path} line {self.line}: {type(value).__name__} "
                                 f"found where a JSON object was expected")
        return value


def read_metrics(path: str | os.PathLike) -> list[dict]:
    """Every complete row of a metrics log, in order; rows lacking ``records`` are refused."""
    tail = LogTail(path, "metrics log")
    rows = tail.read()
    for number, row in enumerate(rows, 1):
        if type(row.get("records")) is not int:
            raise ModelFileError(f"{tail.path} row {number}: 'records' is missing or not a "
                                 f"whole number, got {row.get('records')!r}")
    return rows


def read_events(path: str | os.PathLike | None) -> list[dict]:
    """Every complete drift event of an events file (none if ``path`` is None or absent)."""
    if path is None:
        return []
    tail = LogTail(path, "events file")
    events = tail.read()
    for number, event in enumerate(events, 1):
        check_event(event, f"{tail.path} event {number}")
    return events


def check_event(event: dict, where: str) -> None:
    """Refuse an event without a whole-number ``record`` or a ``kind``."""
    if type(event.get("record")) is not int:
        raise ModelFileError(f"{where}: 'record' is missing or not a whole number, got "
                             f"{event.get('record')!r}")
    if not isinstance(event.get("kind"), str):
        raise ModelFileError(f"{where}: 'kind' is missing or not text, got "
                             f"{event.get('kind')!r}")


def event_path_text(path: Any) -> str:
    """The conditions leading to an event's node as one line of text ("root" if none)."""
    if isinstance(path, str):
        return path or "root"
    if not isinstance(path, list) or not path:
        return "root"
    parts = []
    for step in path:
        if isinstance(step, dict) and {"feature", "op", "value"} <= set(step):
            value = step["value"]
            if isinstance(value, list):
                value = "{" + ", ".join(str(v) for v in value) + "}"
            elif isinstance(value, float):
                value = format_number(value)
            parts.append(f"{step['feature']} {step['op']} {value}")
        else:
            parts.append(str(step))
    return " AND ".join(parts)
