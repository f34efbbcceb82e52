"""What every benchmark suite shares: the :class:`Bench` (sizes, seed, clock, progress
sink, scratch directory), results (:class:`SuiteResult`, :class:`Check`, :class:`Column`),
the suite registry and the number formats of the tables."""

from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path
from typing import Callable

import click

from stream.errors import SapwoodError

from .streams import STREAMS

MB = 1e6
"""Bytes in the megabyte the memory targets are stated in."""


# ---------------------------------------------------------------- results

def fmt_ratio(value: float) -> str:
    return f"{value:,.1f}x" if value >= 10 else f"{value:.2f}x"


_UNITS: dict[str, Callable[[float], str]] = {
    "x": fmt_ratio,
    # one record in 200,000 is 0.0005 percentage points: enough decimals to show it
    "pt": lambda v: f"{100 * v:.4f} pt",
    "%": lambda v: f"{100 * v:.3f}%",
    "MB": lambda v: f"{v:,.1f} MB",
    "s": lambda v: f"{v:,.2f} s",
    "/1M": lambda v: f"{v:,.1f} per 1M",
    "rmse": lambda v: f"{v:.4f}",
    "rec/s": lambda v: f"{v:,.0f} rec/s",
}


@dataclasses.dataclass(frozen=True)
class Check:
    """One target: ``value op target`` (``op`` is ``>=`` or ``<=``).

    ``unit`` says how to show the values: ``x`` (a ratio), ``%`` (a fraction; the gap
    is shown in percentage points), ``MB``. ``value`` is None when not measured.
    """

    what: str
    value: float | None
    target: float
    op: str = ">="
    unit: str = "x"

    @property
    def met(self) -> bool | None:
        if self.value is None or not math.isfinite(self.value):
            return None
        return self.value >= self.target if self.op == ">=" else self.value <= self.target

    def verdict(self) -> str:
        """``target met``, ``MISSED by <gap>`` or ``not measured``."""
        if self.met is None:
            return "not measured"
        if self.met:
            return "target met"
        gap = abs(self.target - self.value)
        shown = _UNITS["pt"](gap) if self.unit == "%" else _UNITS[self.unit](gap)
        return f"MISSED by {shown}"

    def describe(self) -> str:
        show = _UNITS[self.unit]
        value = "n/a" if self.value is None else show(self.value)
        return f"{self.what}: {value} (target {self.op} {show(self.target)}): {self.verdict()}"

    def to_dict(self) -> dict:
        return {"what": self.what, "value": self.value, "target": self.target,
                "op": self.op, "unit": self.unit, "met": self.met, "verdict": self.verdict()}


@dataclasses.dataclass(frozen=True)
class Column:
    """A table column: the row key it shows, its header and how to format a value."""

    key: str
    header: str
    fmt: Callable[[object], str] = str
    left: bool = False


@dataclasses.dataclass
class SuiteResult:
    """What a suite measured: one table, the targets it checked and notes to the reader."""

    name: str
    title: str
    columns: list[Column]
    rows: list[dict] = dataclasses.field(default_factory=list)
    checks: list[Check] = dataclasses.field(default_factory=list)
    notes: list[str] = dataclasses.field(default_factory=list)

    def cells(self) -> list[list[str]]:
        """The rows formatted as text, one list per row, in column order."""
        return [[("" if row.get(c.key) is None else c.fmt(row[c.key])) for c in self.columns]
                for row in self.rows]

    def to_dict(self) -> dict:
        return {"name": self.name, "title": self.title, "rows": self.rows,
                "checks": [c.to_dict() for c in self.checks], "notes": self.notes}


def to_stderr(message: str) -> None:
    click.echo(message, err=True)


@dataclasses.dataclass
class Bench:
    """Sizes, seed and the outside world (clock, progress sink, scratch directory).

    ``river_records`` maps a stream name (or ``*`` for every stream) to the number of
    leading records river is timed on, when the whole stream would take too long.
    """

    workdir: Path
    records: int = 200_000
    river_records: dict[str, int] = dataclasses.field(default_factory=dict)
    streams: tuple[str, ...] = ()
    csv_rows: int = 1_000_000
    memory_rows: tuple[int, int] = (200_000, 2_000_000)
    repeats: int = 3
    seed: int = 1
    clock: Callable[[], float] = time.perf_counter
    say: Callable[[str], None] = to_stderr
    _child_warm: dict | None = None

    def __post_init__(self) -> None:
        self.streams = tuple(self.streams) or tuple(STREAMS)
        unknown = [s for s in [*self.streams, *self.river_records] if s not in STREAMS
                   and s != "*"]
        if unknown:
            raise SapwoodError(f"stream must be one of {', '.join(STREAMS)}, got {unknown[0]!r}")

    def river_prefix(self, stream: str) -> int:
        """Records river is timed on for ``stream``."""
        limit = self.river_records.get(stream, self.river_records.get("*", self.records))
        return min(self.records, limit)

    def to_dict(self) -> dict:
        return {"records": self.records, "river_records": dict(self.river_records),
                "streams": list(self.streams), "csv_rows": self.csv_rows,
                "memory_rows": list(self.memory_rows), "repeats": self.repeats,
                "seed": self.seed}


Suite = Callable[[Bench], SuiteResult]
SUITES: dict[str, Suite] = {}
"""Benchmark suites by name, in the order ``--suite all`` runs them."""


def register(name: str) -> Callable[[Suite], Suite]:
    """Add a suite to :data:`SUITES` under ``name``."""
    def add(function: Suite) -> Suite:
        SUITES[name] = function
        return function
    return add


# ---------------------------------------------------------------- helpers

def best_of(repeats: int, run: Callable[[], tuple], clock) -> tuple[float, tuple]:
    """Shortest time of ``repeats`` calls of ``run`` (a fresh learner each: the results
    are the same every time) and the last call's result. sapwood's runs over records in
    memory take a fraction of a second, so a one-off cost (a cached kernel loaded, the
    machine busy for a moment) would otherwise weigh on the rate; river's runs take tens
    of seconds and are timed once."""
    best, out = math.inf, ()
    for _ in range(max(1, repeats)):
        start = clock()
        out = run()
        best = min(best, clock() - start)
    return best, out


def fmt_pct(value) -> str:
    return f"{100 * value:.2f}%"


def fmt_count(value) -> str:
    return f"{value:,.0f}"


def fmt_mb(value) -> str:
    return f"{value:,.1f}"
