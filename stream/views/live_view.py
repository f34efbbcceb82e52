"""A live terminal view of a running learner: rules, headline metrics with trends, drift.

Inside: :class:`WatchState` (what has been read so far from a snapshot directory, a
metrics log and an events file; :meth:`WatchState.refresh` reads what is new),
:func:`render_frame` (state -> lines of text; pure, so tests compare it exactly),
:func:`sparkline` and :func:`watch` (the refresh loop).

On a terminal the frame is redrawn in place every interval (cursor home, each line
cleared to its end, the rest of the screen cleared). When the output is not a terminal
(a pipe, a log file) there are no control codes: a plain block with a time stamp is
printed each interval in which something new was read, so the output reads as a log.
State is kept apart from display: reading never depends on what was drawn.

A run keeps writing while it is watched: a snapshot named by the index may be removed by
retention before it is read, a log line may be half written. Such moments are skipped
and read again at the next refresh; the frame says what could not be read.
"""

from __future__ import annotations

import collections
import os
import shutil
import sys
import time
from datetime import datetime, timezone
from typing import Callable, Sequence, TextIO

from stream.shown import for_terminal, printable
from stream.errors import SapwoodError
from stream.rules.concern import concern_of, top_rules
from stream.rules.rule import Rule, rules_from_payload
from stream.rules.thresholds import Thresholds
from stream.rules.text import CAUTION, MARKS_LEGEND, rule_conditions_text, uses_marks
from stream.run.snapshots import SnapshotStore

from .rule_sources import read_snapshot
from .run_logs import LogTail, check_event, event_path_text

BLOCKS = "▁▂▃▄▅▆▇█"
ASCII_BLOCKS = "_.-=+*#@"
PLAIN_WIDTH = 1000


class WatchState:
    """What a watcher knows about a run, updated by :meth:`refresh`.

    Parameters
    ----------
    snapshot_dir
        The run's snapshot directory (may not exist yet).
    metrics_path, events_path
        The run's metrics log and drift events file (optional; may not exist yet).
    history
        Metrics rows kept for the trend lines.
    """

    def __init__(self, snapshot_dir: str | None, metrics_path: str | None = None,
                 events_path: str | None = None, history: int = 60,
                 exact: bool = False) -> None:
        self.snapshot_dir = snapshot_dir
        self.exact = exact       # thresholds in full, not in the data's resolution
        self.store = SnapshotStore(snapshot_dir) if snapshot_dir else None
        self.metrics = LogTail(metrics_path, "metrics log") if metrics_path else None
        self.events_tail = LogTail(events_path, "events file") if events_path else None
        self.rows: collections.deque = collections.deque(maxlen=history)
        self.events: collections.deque = collections.deque(maxlen=50)
        self.event_count = 0
        self.swap_count = 0      # confirmed changes among them
        self.entries: list[dict] = []
        self.snapshot: dict | None = None
        self.rules: list[Rule] = []
        self.problem: str | None = None

    def refresh(self) -> bool:
        """Read what is new; True when anything changed."""
        self.problem = None
        changed = False
        for step in (self._read_snapshots, self._read_metrics, self._read_events):
            try:
                changed = step() or changed
            except SapwoodError as exc:
                self.problem = str(exc)
        return changed

    def _read_snapshots(self) -> bool:
        if self.store is None or not os.path.isdir(self.snapshot_dir):
            return False
        entries = self.store.entries()
        if not entries or (self.snapshot is not None
                           and entries[-1]["sequence"] == self.snapshot["sequence"]):
            self.entries = entries
            return False
        document = read_snapshot(self.store, entries[-1]["sequence"])
        self.entries = entries
        self.snapshot = document
        self.rules = rules_from_payload(document)
        return True

    def _read_metrics(self) -> bool:
        if self.metrics is None:
            return False
        rows = self.metrics.read()
        if self.metrics.restarted:
            self.rows.clear()
        self.rows.extend(r for r in rows if type(r.get("records")) is int)
        return bool(rows) or self.metrics.restarted

    def _read_events(self) -> bool:
        if self.events_tail is None:
            return False
        events = self.events_tail.read()
        if self.events_tail.restarted:
            self.events.clear()
            self.event_count = 0
            self.swap_count = 0
        for event in events:
            check_event(event, f"{self.events_tail.path} line {self.events_tail.line}")
        self.events.extend(events)
        self.event_count += len(events)
        self.swap_count += sum(event.get("kind") == "swap" for event in events)
        return bool(events) or self.events_tail.restarted


# --------------------------------------------------------------------------- drawing


def sparkline(values: Sequence[float | None], width: int, blocks: str = BLOCKS) -> str:
    """The last ``width`` values as one character each, lowest to highest block;
    missing values are spaces. A flat series is drawn at mid height."""
    shown = list(values)[-width:] if width > 0 else []
    present = [v for v in shown if v is not None]
    if not present:
        return " " * len(shown)
    lo, hi = min(present), max(present)
    top = len(blocks) - 1
    out = []
    for v in shown:
        if v is None:
            out.append(" ")
        elif hi == lo:
            out.append(blocks[top // 2])
        else:
            out.append(blocks[round((v - lo) / (hi - lo) * top)])
    return "".join(out)


def _pct(value) -> str:
    return "  n/a" if value is None else f"{100 * value:5.1f}%"


def _num(value) -> str:
    return "  n/a" if value is None else f"{value:6.3f}"


def _trend(values: list, percent: bool) -> str:
    present = [v for v in values if v is not None]
    if len(present) < 2:
        return ""
    by = present[-1] - present[0]
    if percent:
        text = f"{100 * by:+.1f} pts"
        flat = abs(100 * by) < 0.05
    else:
        text = f"{by:+.3f}"
        flat = abs(by) < 0.0005
    return ("steady" if flat else ("up " if by > 0 else "down ") + text.lstrip("+-")) + \
        f" over {len(present)} rows"


def _clip(line: str, width: int) -> str:
    return line if len(line) <= width else line[:max(width - 1, 0)] + "~"


def render_frame(state: WatchState, width: int = 100, height: int = 40, now: str = "",
                 blocks: str = BLOCKS) -> list[str]:
    """The view as lines of at most ``width`` characters, at most ``height`` lines.

    Sections, top to bottom: title, run facts, metrics with trend lines, tree size,
    recent drift events, rules (those predicting the class of concern first, then by
    coverage; as many as fit), the safety line.
    """
    width = max(width, 40)
    doc = state.snapshot or {}
    rows = list(state.rows)
    last = rows[-1] if rows else {}
    target = doc.get("target", "?")
    lines = [f"sapwood watch | target {target}" + (f" | {now}" if now else "")]
    records = last.get("records", doc.get("records"))
    facts = [f"{records:,} records" if isinstance(records, int) else "no records yet"]
    if doc:
        facts.append(f"snapshot {doc.get('sequence')} at {doc.get('records', 0):,} records "
                     f"({len(state.entries)} kept)")
        facts.append(f"{len(state.rules)} rules")
    elif state.snapshot_dir:
        facts.append(f"waiting for the first snapshot in {state.snapshot_dir}")
    if last.get("time"):
        facts.append(f"data time {last['time']}")
    lines.append(" | ".join(facts))
    rule = "-" * min(width, 100)  # a plain log gets a rule of normal length
    lines.append(rule)

    spark = max(min(width - 52, 40), 8)
    metrics = doc.get("metrics", {})
    concern = doc.get("concern")
    if rows:
        if concern is not None and any(r.get("concern_recall") is not None for r in rows):
            series = [r.get("window_concern_recall") for r in rows]
            lines.append(f"class of concern {printable(str(concern))}: recall "
                         f"{_pct(last.get('concern_recall'))} (last window "
                         f"{_pct(last.get('window_concern_recall'))}), precision "
                         f"{_pct(last.get('concern_precision'))}  "
                         f"{sparkline(series, spark, blocks)}  {_trend(series[-spark:], True)}")
        for label, key, window_key, percent in (
                ("accuracy", "accuracy", "window_accuracy", True),
                ("kappa", "kappa", "window_kappa", False),
                ("kappa-M", "kappa_m", "window_kappa_m", False)):
            fmt = _pct if percent else _num
            series = [r.get(window_key) for r in rows]
            lines.append(f"{label:<9}{fmt(last.get(key))}  last window "
                         f"{fmt(last.get(window_key))}  {sparkline(series, spark, blocks)}  "
                         f"{_trend(series[-spark:], percent)}")
        if last.get("fading_accuracy") is not None:
            lines.append(f"{'fading':<9}{_pct(last.get('fading_accuracy'))}")
        leaves = [r.get("leaves") for r in rows]
        lines.append(f"{'tree':<9}{last.get('leaves', '?')} leaves, depth "
                     f"{last.get('depth', '?')}  {sparkline(leaves, spark, blocks)}")
    elif metrics:
        lines.append(f"{'accuracy':<9}{_pct(metrics.get('accuracy'))}  last window "
                     f"{_pct(metrics.get('window_accuracy'))}  (from the snapshot)")
        lines.append(f"{'kappa':<9}{_num(metrics.get('kappa'))}")
    else:
        lines.append("no metrics yet" + ("" if state.metrics else
                                         " (give --metrics to follow the metrics log)"))
    lines.append(rule)

    if state.events_tail is not None:
        shown = list(state.events)[-5:]
        lines.append(f"drift events: {state.event_count} so far, {state.swap_count} of them "
                     f"confirmed (swaps)" + (f"; latest {len(shown)}:" if shown else ""))
        for event in reversed(shown):
            where = event_path_text(event.get("path"))
            lines.append(f"  record {event['record']:>11,}  {event['kind']:<6} node "
                         f"{event.get('node', '?')!s:<5} {where}")
        lines.append(rule)

    footer = [CAUTION]
    if state.problem:
        footer.insert(0, f"(could not read everything this time: {state.problem})")
    room = height - len(lines) - len(footer) - 1
    if state.rules and room > 0:
        concern = concern_of(state.snapshot or {}, state.rules)
        style = Thresholds.of(state.snapshot, state.exact)
        ranked = state.rules
        show = top_rules(ranked, concern, room) if concern is not None else \
            sorted(ranked, key=lambda r: (-r.coverage, r.id))[:room]
        lines.append(f"rules, class of concern {printable(str(concern))} first "
                     f"({len(show)} of {len(ranked)}):" if concern is not None else
                     f"rules by coverage ({len(show)} of {len(ranked)}):")
        id_width = max(len(r.id) for r in show)
        class_width = max(len(str(r.predict)) for r in show)
        for r in show:
            # before the conditions, which a narrow terminal cuts off
            state = {"watching": "[watching] ",
                     "replaced": "[replaced] "}.get(getattr(r, "drift", "stable"), "")
            lines.append(f"  {r.id:<{id_width}}  {r.predict!s:<{class_width}} "
                         f"{_pct(r.confidence)} conf {_pct(r.coverage)} cov  {state}"
                         f"{rule_conditions_text(r, style)}")
        if uses_marks(show) and len(lines) < height - len(footer):
            lines.append(MARKS_LEGEND)
    lines.extend(footer)
    return [_clip(line, width) for line in lines[:height]]


# --------------------------------------------------------------------------- the loop


def _stamp(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _blocks_for(out: TextIO) -> str:
    encoding = getattr(out, "encoding", None) or "ascii"
    try:
        BLOCKS.encode(encoding)
    except (UnicodeEncodeError, LookupError):
        return ASCII_BLOCKS
    return BLOCKS


def watch(state: WatchState, out: TextIO | None = None, interval: float = 2.0,
          iterations: int | None = None, tty: bool | None = None,
          sleep: Callable[[float], None] = time.sleep,
          wall: Callable[[], float] = time.time,
          size: Callable[[], os.terminal_size] = shutil.get_terminal_size) -> None:
    """Refresh and draw until interrupted (or ``iterations`` refreshes).

    Parameters
    ----------
    state
        What to read.
    out
        Where to draw (standard output by default).
    interval
        Seconds between refreshes.
    iterations
        Stop after this many refreshes (None: until Ctrl-C).
    tty
        Draw in place (True) or print plain blocks (False); by default, whether ``out``
        is a terminal.
    sleep, wall, size
        The pause, the wall clock and the terminal size, passed in so tests need no
        terminal and no waiting.
    """
    out = out or sys.stdout
    if tty is None:
        tty = hasattr(out, "isatty") and out.isatty()
    blocks = _blocks_for(out)
    count = 0
    if tty:
        out.write("\x1b[?25l\x1b[2J")  # hide the cursor, clear once
    try:
        while iterations is None or count < iterations:
            changed = state.refresh()
            now = _stamp(wall())
            if tty:
                columns, lines = size()
                frame = [for_terminal(line)
                         for line in render_frame(state, columns, lines, now, blocks)]
                out.write("\x1b[H" + "".join(line + "\x1b[K\n" for line in frame[:-1])
                          + frame[-1] + "\x1b[K\x1b[J")
                out.flush()
            elif changed or count == 0:
                # a log is read later, maybe wider: no clipping, the rules that fit 40 lines
                frame = [for_terminal(line)
                         for line in render_frame(state, PLAIN_WIDTH, 40, now, blocks)]
                out.write("\n".join(frame) + "\n\n")
                out.flush()
            count += 1
            if iterations is None or count < iterations:
                sleep(interval)
    finally:
        if tty:
            out.write("\x1b[?25h\n")  # show the cursor again
            out.flush()

