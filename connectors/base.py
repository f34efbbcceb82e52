"""What every record source hands to the engine, and the protocol sources follow.

A source turns bytes into :class:`RawBatch` objects: a pandas frame of records as read
(no schema applied yet) plus where each row came from, and the rows that could not even
be split into fields. Parsing against the schema happens later, in ``stream.run.encoding``.
"""

from __future__ import annotations

import dataclasses
from typing import Iterator, Protocol, runtime_checkable

import numpy as np
import pandas as pd


@dataclasses.dataclass(frozen=True)
class Reject:
    """A record kept out of learning, with where it was and why.

    ``line`` is the 1-based physical line in ``origin`` (the header is line 1 for CSV);
    ``field`` and ``value`` are ``None`` when the whole record is at fault.
    """

    origin: str
    line: int
    field: str | None
    value: str | None
    reason: str

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    def message(self) -> str:
        """One line such as "data.csv line 1042, field 'supply_temp': 'abc' is not a number"."""
        where = f"{self.origin} line {self.line}"
        if self.field is not None:
            where += f", field {self.field!r}"
        if self.value is not None:
            return f"{where}: {self.value!r} {self.reason}"
        return f"{where}: {self.reason}"


@dataclasses.dataclass
class RawBatch:
    """Consecutive records of one origin, as read.

    Attributes
    ----------
    frame
        One row per record that could be split into fields; columns as named in the source.
    origin
        The file name, or ``-`` for standard input.
    lines
        int64 array, the 1-based physical line of each row of ``frame``.
    rejects
        Records of this stretch that could not be split into fields.
    position
        Where the source stands just after this batch (JSON-able, source-specific), for
        checkpoints; None for sources that cannot resume.
    keyed
        The records name their fields (JSON, broker fields): a column exists in
        ``frame`` because some record of the batch has that key, so which columns a
        frame has depends on the batch. A header-led format (CSV) has them all.
    """

    frame: pd.DataFrame
    origin: str
    lines: np.ndarray
    rejects: list[Reject] = dataclasses.field(default_factory=list)
    position: dict | None = None
    keyed: bool = False

    def __len__(self) -> int:
        return len(self.frame)


class ColumnHints:
    """What the run has settled about the columns, shared with the readers as it settles
    it (readers on other threads read it; it is only ever replaced whole).

    ``labels``: columns read as labels (category fields, class labels). A reader that
    can may hand them over already numbered, as a pandas Categorical, instead of as text
    to be numbered later; the labels are the same either way."""

    def __init__(self) -> None:
        self.labels: frozenset[str] = frozenset()


@runtime_checkable
class Source(Protocol):
    """A stream of records: iterate batches, then close."""

    name: str

    def batches(self) -> Iterator[RawBatch]:
        """Yield batches in stream order until the source ends."""
        ...

    def close(self) -> None:
        """Release files and connections; safe to call twice."""
        ...


@runtime_checkable
class ResumableSource(Source, Protocol):
    """A source a checkpoint can return to.

    The engine keeps ``batch.position`` of the last batch it fully learned; it writes a
    checkpoint holding that position and then calls :meth:`commit` with it, so a broker
    source acknowledges only what a durable checkpoint covers. After a restart the engine
    calls :meth:`seek` with the checkpoint's position before iterating.
    """

    def seek(self, position: dict) -> None:
        """Continue just after ``position`` (before :meth:`batches` is called)."""
        ...

    def commit(self, position: dict) -> None:
        """Everything up to ``position`` is in a durable checkpoint."""
        ...
