"""Hand-written inline SVG charts for the report page: fold scores, intervals, coefficient ranges.

Server-side and dependency-free, so the page renders offline and without JavaScript. Every point
carries a ``<title>`` (the browser shows it on hover) and every series differs in shape as well as
colour, so the charts still read in grey-scale print.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from service.report.markup import Markup, element

INK, GRID, MUTED = "#222222", "#dddddd", "#666666"
CANDIDATE, BASELINE, CHAMPION, HOLDOUT = "#1f5f8b", "#7a7a7a", "#a4541c", "#2e7d32"
FONT = {"font-family": "system-ui, sans-serif", "font-size": 12, "fill": INK}


@dataclass(frozen=True)
class Series:
    """One line of fold scores: a name, a value per fold (None where the fold has none), a marker."""

    name: str
    values: Sequence[float | None]
    color: str
    marker: str  # "circle" | "square" | "diamond"


@dataclass(frozen=True)
class Scale:
    """A linear map from data values onto a pixel range."""

    lo: float
    hi: float
    start: float
    end: float

    def __call__(self, value: float) -> float:
        return self.start + (value - self.lo) / (self.hi - self.lo) * (self.end - self.start)


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values spanning [lo, hi]: steps of 1, 2 or 5 times a power of ten."""
    if not hi > lo:
        return [lo]
    raw = (hi - lo) / max(count, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    value = first
    while value <= hi + step * 1e-9:
        ticks.append(0.0 if abs(value) < step * 1e-9 else value)
        value += step
    return ticks


def padded_range(values: Sequence[float]) -> tuple[float, float]:
    """The range of ``values`` widened by 8 % on each side (or by 1 when they are all equal)."""
    lo, hi = min(values), max(values)
    if hi == lo:
        spread = abs(lo) * 0.1 or 1.0
        return lo - spread, hi + spread
    pad = (hi - lo) * 0.08
    return lo - pad, hi + pad


def figure(value: float | None, digits: int = 4) -> str:
    """Format a metric value with ``digits`` significant digits ("-" when absent)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:.{digits}g}"


def marker(shape: str, x: float, y: float, color: str, title: str, size: float = 5.0) -> Markup:
    """A point marker with a hover title; hollow squares, filled circles and diamonds."""
    tip = element("title", None, title)
    if shape == "square":
        return element("rect", {"x": x - size, "y": y - size, "width": 2 * size, "height": 2 * size,
                                "fill": "#ffffff", "stroke": color, "stroke-width": 2}, tip)
    if shape == "diamond":
        s = size * 1.3
        points = f"{x:.1f},{y - s:.1f} {x + s:.1f},{y:.1f} {x:.1f},{y + s:.1f} {x - s:.1f},{y:.1f}"
        return element("polygon", {"points": points, "fill": color}, tip)
    return element("circle", {"cx": x, "cy": y, "r": size, "fill": color}, tip)


def _text(x: float, y: float, content: str, anchor: str = "start", fill: str = INK, size: int = 12) -> Markup:
    return element("text", {"x": x, "y": y, "text-anchor": anchor, **FONT, "fill": fill, "font-size": size},
                   content)


def _legend(items: Sequence[tuple[str, str, str]], x: float, y: float) -> Markup:
    parts = []
    for name, color, shape in items:
        parts.append(marker(shape, x + 6, y - 4, color, name))
        parts.append(_text(x + 16, y, name))
        x += 26 + 7.2 * len(name)
    return Markup("".join(parts))


def fold_chart(cells: Sequence[str], series: Sequence[Series], metric: str, greater_is_better: bool,
               width: int = 880, height: int = 320, axis_label: str | None = None, zero_line: bool = False) -> Markup:
    """Each series' score per fold on a shared value axis, the first series' mean dashed; points stand alone.

    The series of one fold sit side by side within its column, so equal scores never hide each other;
    ``zero_line`` keeps 0 in range and draws it (for differences).
    """
    values = [v for s in series for v in s.values if v is not None]
    if not cells or not values:
        return element("p", {"class": "note"}, "No fold scores to chart.")
    left, right, top, bottom = 72, 16, 28, 58
    lo, hi = padded_range([*values, 0.0] if zero_line else values)
    y = Scale(lo, hi, height - bottom, top)
    band = (width - left - right) / len(cells)
    parts: list[Markup] = []
    for tick in nice_ticks(lo, hi, 7):
        parts.append(element("line", {"x1": left, "x2": width - right, "y1": y(tick), "y2": y(tick),
                                      "stroke": GRID}))
        parts.append(_text(left - 8, y(tick) + 4, figure(tick), "end"))
    label_every = max(1, math.ceil(len(cells) / 24))
    for i, cell in enumerate(cells):
        if i % label_every == 0:
            parts.append(_text(left + (i + 0.5) * band, height - bottom + 18, cell, "middle", fill=MUTED))
    if zero_line:
        parts.append(element("line", {"x1": left, "x2": width - right, "y1": y(0.0), "y2": y(0.0), "stroke": INK}))
    # Folds have no order, so their points are never joined by lines.
    step = min(12.0, band / (len(series) + 1))
    candidate = [v for v in series[0].values if v is not None]
    if candidate:
        mean = sum(candidate) / len(candidate)
        parts.append(element("line", {"x1": left, "x2": width - right, "y1": y(mean), "y2": y(mean),
                                      "stroke": series[0].color, "stroke-dasharray": "6 4"},
                             element("title", None, f"{series[0].name} mean {figure(mean)}")))
    for k, s in enumerate(series):
        dodge = (k - (len(series) - 1) / 2) * step
        for i, v in enumerate(s.values):
            if v is not None:
                parts.append(marker(s.marker, left + (i + 0.5) * band + dodge, y(v), s.color,
                                    f"{s.name}, fold {cells[i]}: {metric} {figure(v)}"))
    direction = "higher is better" if greater_is_better else "lower is better"
    parts.append(element("text", {"x": 14, "y": (top + height - bottom) / 2, "text-anchor": "middle", **FONT,
                                  "transform": f"rotate(-90 14 {(top + height - bottom) / 2:.1f})"},
                         axis_label or f"{metric} ({direction})"))
    parts.append(_legend([(s.name, s.color, s.marker) for s in series], left, height - 12))
    return _svg(width, height, f"{metric} per fold", parts)


@dataclass(frozen=True)
class IntervalRow:
    """One row of the interval chart: a point, with an optional interval around it."""

    name: str
    value: float | None
    color: str
    marker: str
    interval: tuple[float, float] | None = None
    note: str = ""


def interval_chart(rows: Sequence[IntervalRow], metric: str, bar: float | None = None,
                   width: int = 880) -> Markup:
    """Points and intervals on one horizontal axis; ``bar`` (the policy's absolute bar) as a dashed line."""
    values = [v for r in rows for v in ((r.value,) + (r.interval or ())) if v is not None]
    if bar is not None:
        values.append(bar)
    if not values:
        return element("p", {"class": "note"}, "No figures to chart.")
    left, right, top, row_height = 250, 24, 16, 34
    height = top + row_height * len(rows) + 40
    lo, hi = padded_range(values)
    x = Scale(lo, hi, left, width - right)
    axis_y = top + row_height * len(rows) + 6
    parts: list[Markup] = []
    for tick in nice_ticks(lo, hi, 6):
        parts.append(element("line", {"x1": x(tick), "x2": x(tick), "y1": top, "y2": axis_y, "stroke": GRID}))
        parts.append(_text(x(tick), axis_y + 16, figure(tick), "middle", fill=MUTED))
    if bar is not None:
        parts.append(element("line", {"x1": x(bar), "x2": x(bar), "y1": top - 6, "y2": axis_y,
                                      "stroke": INK, "stroke-dasharray": "3 3"},
                             element("title", None, f"the policy's bar: {metric} {figure(bar)}")))
        parts.append(_text(x(bar) + 4, top + 2, f"bar {figure(bar)}", size=11))
    for i, row in enumerate(rows):
        cy = top + row_height * i + row_height / 2
        parts.append(_text(left - 12, cy + 4, row.name, "end"))
        if row.interval is not None:
            a, b = x(row.interval[0]), x(row.interval[1])
            tip = element("title", None, f"{row.name}: {figure(row.interval[0])} to {figure(row.interval[1])}")
            parts.append(element("line", {"x1": a, "x2": b, "y1": cy, "y2": cy, "stroke": row.color,
                                          "stroke-width": 3}, tip))
            for end in (a, b):
                parts.append(element("line", {"x1": end, "x2": end, "y1": cy - 7, "y2": cy + 7,
                                              "stroke": row.color, "stroke-width": 2}))
        if row.value is not None:
            parts.append(marker(row.marker, x(row.value), cy, row.color, f"{row.name}: {metric} {figure(row.value)}"))
            label = figure(row.value) + (f"  {row.note}" if row.note else "")
            parts.append(_text(min(x(row.value) + 10, width - right - 60), cy - 9, label, size=11,
                               fill=MUTED))
        else:
            parts.append(_text(left + 4, cy + 4, row.note or "not available", fill=MUTED))
    return _svg(width, height, f"{metric}: cross-validation against holdout", parts)


@dataclass(frozen=True)
class TermRange:
    """A coefficient's spread over the folds: min, mean, max, and whether its sign held."""

    name: str
    mean: float
    low: float
    high: float
    sign_stable: bool | None


def coefficient_chart(terms: Sequence[TermRange], width: int = 880) -> Markup:
    """Each term's min-to-max range over the folds with its mean, against a zero line."""
    if not terms:
        return element("p", {"class": "note"}, "No coefficients to chart.")
    left, right, top, row_height = 250, 24, 12, 22
    height = top + row_height * len(terms) + 36
    lo, hi = padded_range([0.0, *(t.low for t in terms), *(t.high for t in terms)])
    x = Scale(lo, hi, left, width - right)
    axis_y = top + row_height * len(terms) + 4
    parts: list[Markup] = []
    for tick in nice_ticks(lo, hi, 6):
        parts.append(element("line", {"x1": x(tick), "x2": x(tick), "y1": top, "y2": axis_y, "stroke": GRID}))
        parts.append(_text(x(tick), axis_y + 16, figure(tick, 3), "middle", fill=MUTED))
    parts.append(element("line", {"x1": x(0.0), "x2": x(0.0), "y1": top, "y2": axis_y, "stroke": INK}))
    for i, term in enumerate(terms):
        cy = top + row_height * i + row_height / 2
        color = CANDIDATE if term.sign_stable else CHAMPION
        shown = term.name if len(term.name) <= 34 else term.name[:33] + "\u2026"
        parts.append(element("text", {"x": left - 12, "y": cy + 4, "text-anchor": "end", **FONT},
                             element("title", None, term.name), shown))
        tip = element("title", None, f"{term.name}: {figure(term.low)} to {figure(term.high)}, "
                                     f"mean {figure(term.mean)}")
        parts.append(element("line", {"x1": x(term.low), "x2": x(term.high), "y1": cy, "y2": cy,
                                      "stroke": color, "stroke-width": 3}, tip))
        parts.append(marker("circle" if term.sign_stable else "diamond", x(term.mean), cy, color,
                            f"{term.name}: mean {figure(term.mean)}", 4.0))
    return _svg(width, height, "coefficient ranges over the folds", parts)


def _svg(width: int, height: int, title: str, parts: Sequence[Markup]) -> Markup:
    return element("svg", {"xmlns": "http://www.w3.org/2000/svg", "viewBox": f"0 0 {width} {height}",
                           "width": "100%", "role": "img", "aria-label": title, "class": "chart"},
                   element("title", None, title), parts)
