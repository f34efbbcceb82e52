"""The quarantine sink: records kept out of learning, one JSON object per line.

Each line is ``{"origin": ..., "line": ..., "field": ..., "value": ..., "reason": ...}``
(the fields of :class:`~connectors.base.Reject`), so the file can be searched with any
JSON Lines tool and the bad records found again in their source.
"""

from __future__ import annotations

import json
from typing import Iterable

from stream.errors import ConfigError

from .base import Reject


class QuarantineWriter:
    """Appends rejects to a JSON Lines file and counts them.

    Parameters
    ----------
    path
        File to append to (created if missing); None to count only.

    Examples
    --------
    >>> with QuarantineWriter(None) as q:
    ...     q.write([Reject("a.csv", 3, "t", "x", "is not a number")])
    ...     q.count
    1
    """

    def __init__(self, path: str | None) -> None:
        self.path = path
        self.count = 0
        self._out = None
        if path is not None:
            try:
                self._out = open(path, "a", encoding="utf-8")
            except OSError as exc:
                reason = exc.strerror or str(exc)
                raise ConfigError(f"cannot write quarantine file {path!r}: {reason}") from exc

    def write(self, rejects: Iterable[Reject]) -> None:
        """Append one batch's rejects and flush, so the file is current after each batch."""
        rejects = list(rejects)
        self.count += len(rejects)
        if self._out is not None and rejects:
            self._out.write("".join(json.dumps(r.to_dict(), ensure_ascii=False) + "\n"
                                    for r in rejects))
            self._out.flush()

    def close(self) -> None:
        """Close the file; safe to call twice."""
        if self._out is not None:
            self._out.close()
            self._out = None

    def __enter__(self) -> "QuarantineWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
