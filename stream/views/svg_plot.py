"""Small inline-SVG charts for the HTML report: lines with event markers, and bars.

Inside: :class:`Series`, :class:`Marker`, :func:`line_chart`, :func:`bar_chart`,
:func:`nice_ticks`, :func:`nice_domain` and :func:`thin_points`. Output is SVG text to
paste into HTML; no scripts, fonts or files outside the page. Pure functions with fixed
decimals, so the same data always give the same bytes.

So that anyone can read the data back from a chart, the ``<svg>`` element carries
``data-x-domain``, ``data-y-domain`` ("low high") and ``data-area`` ("left top width
height" of the plotting area, in SVG units), and each line is a ``<polyline>`` with
``data-series`` naming it. A point (x, y) is drawn at
``left + (x - x_low) / (x_high - x_low) * width`` and
``top + (y_high - y) / (y_high - y_low) * height``, rounded to 2 decimals.
"""

from __future__ import annotations

import dataclasses
import math
from html import escape
from typing import Sequence

PALETTE = ("#1f5f99", "#d9731a", "#2a8a4a", "#8e3b8e", "#b8323a", "#5c6b73")
MARKER_COLORS = {"alarm": "#b8323a", "start": "#d9731a", "swap": "#1f5f99",
                 "drop": "#5c6b73"}
MARKER_DASH = {"alarm": "2 3", "start": "4 3", "swap": "", "drop": "6 2 1 2"}
MARKER_WEIGHT = {"swap": (2.5, 1.0), "alarm": (1.0, 0.35), "start": (1.0, 0.6),
                 "drop": (1.0, 0.6)}
"""Stroke width and opacity per event kind: a swap (a change confirmed: the alternate
beat the part it replaces) stands out; an alarm (a detector's suspicion, often not
confirmed) stays faint."""
MARKER_NAMES = {"swap": "swap (confirmed change)", "alarm": "alarm (unconfirmed)",
                "start": "alternate started", "drop": "alternate dropped"}


@dataclasses.dataclass(frozen=True)
class Series:
    """One line: a name, x and y values (None for a gap) and a colour."""

    name: str
    xs: Sequence[float]
    ys: Sequence[float | None]
    color: str
    dash: str = ""


@dataclasses.dataclass(frozen=True)
class Marker:
    """A vertical line at ``x`` (a drift event), with a kind and a tooltip."""

    x: float
    kind: str
    label: str


def nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2 or 5 times a power of ten apart) covering [low, high]."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return []
    if high <= low:
        return [low]
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(low / step - 1e-9) * step
    ticks = []
    k = 0
    while first + k * step <= high + step * 1e-9:
        ticks.append(round(first + k * step, 12))
        k += 1
    return ticks


def nice_domain(low: float, high: float, count: int = 5) -> tuple[float, float]:
    """[low, high] widened to the round tick values just outside it."""
    if high <= low:
        pad = abs(low) * 0.05 or 1.0
        low, high = low - pad, high + pad
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    start = round(math.floor(low / step + 1e-9) * step, 12)
    end = round(math.ceil(high / step - 1e-9) * step, 12)
    # the tolerance above keeps 0.3 from becoming 0.2; it must not cut off real data
    return (start - step if start > low else start, end + step if end < high else end)


def _tick_text(value: float, step: float) -> str:
    if abs(value) >= 10000 and step >= 1000:
        if abs(value) >= 1e6 and step >= 1e5:
            return f"{value / 1e6:g}M"
        return f"{value / 1e3:g}k"
    decimals = max(0, -math.floor(math.log10(step))) if step > 0 else 0
    return f"{value:.{decimals}f}"


def thin_points(xs: Sequence[float], ys: Sequence[float | None],
                limit: int) -> list[int]:
    """Indices of the points to draw: all of them up to ``limit``; beyond, per bucket
    of consecutive points the first, the lowest and the highest (so peaks and dips
    survive), always the last. Every index kept is a point of the data."""
    n = len(xs)
    if n <= limit:
        return list(range(n))
    buckets = max(limit // 3, 1)
    keep = set()
    for b in range(buckets):
        start, stop = b * n // buckets, (b + 1) * n // buckets
        present = [i for i in range(start, stop) if ys[i] is not None]
        keep.add(start)
        if present:
            keep.add(min(present, key=lambda i: ys[i]))
            keep.add(max(present, key=lambda i: ys[i]))
    keep.add(n - 1)
    return sorted(keep)


def _f(value: float) -> str:
    text = f"{value:.2f}"
    return "0.00" if text == "-0.00" else text


class _Frame:
    """Plot-area geometry and the data -> SVG coordinate maps."""

    def __init__(self, width: int, height: int, x_domain: tuple[float, float],
                 y_domain: tuple[float, float], left: int = 62, right: int = 16,
                 top: int = 34, bottom: int = 42) -> None:
        height += top - 34  # room for extra legend rows
        self.width, self.height = width, height
        self.left, self.top = left, top
        self.w = width - left - right
        self.h = height - top - bottom
        x0, x1 = x_domain
        y0, y1 = y_domain
        self.x0, self.x1 = x0, (x1 if x1 > x0 else x0 + 1)
        self.y0, self.y1 = y0, (y1 if y1 > y0 else y0 + 1)

    def x(self, value: float) -> float:
        return self.left + (value - self.x0) / (self.x1 - self.x0) * self.w

    def y(self, value: float) -> float:
        return self.top + (self.y1 - value) / (self.y1 - self.y0) * self.h

    def open_svg(self, plot_id: str, title: str) -> list[str]:
        return [f'<svg xmlns="http://www.w3.org/2000/svg" class="chart" id="{escape(plot_id)}" '
                f'viewBox="0 0 {self.width} {self.height}" width="{self.width}" '
                f'height="{self.height}" role="img" aria-label="{escape(title)}" '
                f'data-x-domain="{self.x0!r} {self.x1!r}" '
                f'data-y-domain="{self.y0!r} {self.y1!r}" '
                f'data-area="{self.left} {self.top} {self.w} {self.h}">',
                f'<title>{escape(title)}</title>',
                f'<rect x="{self.left}" y="{self.top}" width="{self.w}" height="{self.h}" '
                f'fill="#ffffff" stroke="#c9ced3"/>']

    def axes(self, x_ticks: list[float], y_ticks: list[float], x_label: str,
             y_label: str, y_text=None) -> list[str]:
        out = []
        x_step = x_ticks[1] - x_ticks[0] if len(x_ticks) > 1 else 1.0
        y_step = y_ticks[1] - y_ticks[0] if len(y_ticks) > 1 else 1.0
        bottom = self.top + self.h
        for t in y_ticks:
            y = _f(self.y(t))
            out.append(f'<line x1="{self.left}" x2="{self.left + self.w}" y1="{y}" y2="{y}" '
                       f'stroke="#eceff1"/>')
            text = y_text(t) if y_text else _tick_text(t, y_step)
            out.append(f'<text x="{self.left - 6}" y="{y}" dy="0.32em" text-anchor="end" '
                       f'class="tick">{escape(text)}</text>')
        for t in x_ticks:
            x = _f(self.x(t))
            out.append(f'<line x1="{x}" x2="{x}" y1="{bottom}" y2="{bottom + 4}" '
                       f'stroke="#8a949c"/>')
            out.append(f'<text x="{x}" y="{bottom + 16}" text-anchor="middle" '
                       f'class="tick">{escape(_tick_text(t, x_step))}</text>')
        out.append(f'<text x="{self.left + self.w / 2:.1f}" y="{self.height - 6}" '
                   f'text-anchor="middle" class="axis">{escape(x_label)}</text>')
        out.append(f'<text transform="translate(14 {self.top + self.h / 2:.1f}) rotate(-90)" '
                   f'text-anchor="middle" class="axis">{escape(y_label)}</text>')
        return out

    def legend(self, items: list[tuple[str, str, str]]) -> list[str]:
        out = []
        for (name, color, dash), (x, y) in zip(items, _legend_places(items, self.left,
                                                                     self.width)):
            dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
            out.append(f'<line x1="{x}" x2="{x + 18}" y1="{y}" y2="{y}" stroke="{color}" '
                       f'stroke-width="2.5"{dash_attr}/>')
            out.append(f'<text x="{x + 23}" y="{y}" dy="0.32em" class="legend">'
                       f'{escape(name)}</text>')
        return out


def _legend_places(items: Sequence[tuple], left: int, width: int) -> list[tuple[int, int]]:
    """(x, y) of each legend entry, wrapping to a new row at the right edge
    (text width estimated at 7 units per character of 12-unit type)."""
    places, x, y = [], left, 14
    for name, _, _ in items:
        size = 36 + 7 * len(name)
        if x > left and x + size > width:
            x, y = left, y + 18
        places.append((x, y))
        x += size
    return places


def _top_for(items: Sequence[tuple], left: int, width: int) -> int:
    rows = _legend_places(items, left, width)[-1][1] if items else 14
    return rows + 20


def line_chart(series: Sequence[Series], plot_id: str, title: str, x_label: str,
               y_label: str, markers: Sequence[Marker] = (), y_domain=None,
               width: int = 1000, height: int = 300, max_points: int = 1500,
               percent: bool = False) -> str:
    """Lines over a shared x axis, with vertical markers; returns SVG text.

    ``y_domain`` fixes the y range (default: the data's, widened to round ticks);
    ``percent`` labels y ticks as percentages of 1.
    """
    xs = [x for s in series for x in s.xs] + [m.x for m in markers]
    ys = [y for s in series for y in s.ys if y is not None]
    x_domain = (min(xs), max(xs)) if xs else (0.0, 1.0)
    if y_domain is None:
        y_domain = nice_domain(*((min(ys), max(ys)) if ys else (0.0, 1.0)))
    legend = [(s.name, s.color, s.dash) for s in series]
    kinds = sorted({m.kind for m in markers})
    legend += [(f"drift {MARKER_NAMES.get(k, k)}", MARKER_COLORS.get(k, "#5c6b73"),
                MARKER_DASH.get(k, "2 2")) for k in kinds]
    frame = _Frame(width, height, x_domain, tuple(y_domain), top=_top_for(legend, 62, width))
    y_ticks = [t for t in nice_ticks(frame.y0, frame.y1) if frame.y0 <= t <= frame.y1]
    x_ticks = [t for t in nice_ticks(frame.x0, frame.x1, 6) if frame.x0 <= t <= frame.x1]
    out = frame.open_svg(plot_id, title)
    out += frame.axes(x_ticks, y_ticks, x_label, y_label,
                      (lambda t: f"{100 * t:g}%") if percent else None)
    # faint kinds first, so a swap is drawn over the alarms around it
    for m in sorted(markers, key=lambda m: MARKER_WEIGHT.get(m.kind, (1.0, 0.6))):
        x = _f(frame.x(m.x))
        dash = MARKER_DASH.get(m.kind, "2 2")
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        width, opacity = MARKER_WEIGHT.get(m.kind, (1.0, 0.6))
        out.append(f'<line class="marker" data-kind="{escape(m.kind)}" data-x="{m.x!r}" '
                   f'x1="{x}" x2="{x}" y1="{frame.top}" y2="{frame.top + frame.h}" '
                   f'stroke="{MARKER_COLORS.get(m.kind, "#5c6b73")}" stroke-width="{width}" '
                   f'stroke-opacity="{opacity}"{dash_attr}><title>{escape(m.label)}</title>'
                   f'</line>')
    for s in series:
        keep = thin_points(s.xs, s.ys, max_points)
        runs, current = [], []
        for i in keep:
            if s.ys[i] is None:
                if current:
                    runs.append(current)
                current = []
            else:
                current.append(f"{_f(frame.x(s.xs[i]))},{_f(frame.y(s.ys[i]))}")
        if current:
            runs.append(current)
        dash_attr = f' stroke-dasharray="{s.dash}"' if s.dash else ""
        for run in runs:
            out.append(f'<polyline data-series="{escape(s.name)}" fill="none" '
                       f'stroke="{s.color}" stroke-width="1.8" stroke-linejoin="round"'
                       f'{dash_attr} points="{" ".join(run)}"/>')
    out += frame.legend(legend)
    out.append("</svg>")
    return "\n".join(out)


def bar_chart(labels: Sequence[str], xs: Sequence[float], stacks: dict[str, Sequence[float]],
              colors: dict[str, str], plot_id: str, title: str, x_label: str,
              y_label: str, width: int = 1000, height: int = 280) -> str:
    """Stacked bars, one per x position (e.g. per snapshot); returns SVG text.

    ``stacks`` maps a category name to its value per bar, drawn bottom up in the
    order given; each ``<rect>`` carries ``data-series``, ``data-x`` and ``data-value``.
    """
    totals = [sum(values[k] for values in stacks.values()) for k in range(len(xs))]
    top = max(totals, default=0) or 1
    y_high = nice_domain(0, top)[1]
    ticks = nice_ticks(0, y_high)
    count = max(len(xs), 1)
    legend = [(name, colors[name], "") for name in stacks]
    frame = _Frame(width, height, (-0.5, count - 0.5), (0.0, float(y_high)),
                   top=_top_for(legend, 62, width))
    out = frame.open_svg(plot_id, title)
    slot = frame.w / count
    bar = max(min(slot * 0.7, 48), 1.0)
    # x ticks: at most ~12 labels
    every = max(1, math.ceil(count / 12))
    bottom = frame.top + frame.h
    for t in ticks:
        y = _f(frame.y(t))
        out.append(f'<line x1="{frame.left}" x2="{frame.left + frame.w}" y1="{y}" y2="{y}" '
                   f'stroke="#eceff1"/>')
        out.append(f'<text x="{frame.left - 6}" y="{y}" dy="0.32em" text-anchor="end" '
                   f'class="tick">{t:g}</text>')
    for k, label in enumerate(labels):
        cx = frame.x(k)
        base = 0.0
        for name, values in stacks.items():
            v = values[k]
            if v > 0:
                y_top, y_bottom = frame.y(base + v), frame.y(base)
                out.append(f'<rect data-series="{escape(name)}" data-x="{xs[k]!r}" '
                           f'data-value="{v!r}" x="{_f(cx - bar / 2)}" y="{_f(y_top)}" '
                           f'width="{_f(bar)}" height="{_f(y_bottom - y_top)}" '
                           f'fill="{colors[name]}"><title>{escape(label)}: {v:g} '
                           f'{escape(name)}</title></rect>')
            base += v
        if k % every == 0 or k == count - 1:
            out.append(f'<text x="{_f(cx)}" y="{bottom + 16}" text-anchor="middle" '
                       f'class="tick">{escape(label)}</text>')
    out.append(f'<text x="{frame.left + frame.w / 2:.1f}" y="{frame.height - 6}" '
               f'text-anchor="middle" class="axis">{escape(x_label)}</text>')
    out.append(f'<text transform="translate(14 {frame.top + frame.h / 2:.1f}) rotate(-90)" '
               f'text-anchor="middle" class="axis">{escape(y_label)}</text>')
    out += frame.legend(legend)
    out.append("</svg>")
    return "\n".join(out)
