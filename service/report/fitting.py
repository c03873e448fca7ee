"""Report sections on over- or under-fitting: the train/validation gap, the learning curve, a nested search.

The gap's reading comes from the summary (``worker.learning.fit_readings``) and is shown as evidence, not as a
rule. The learning curve is a hand-written inline SVG like the other charts: training rows on the
x axis, the primary metric's train and validation means over the folds on the y axis.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from service.report.charts import (
    BASELINE,
    CANDIDATE,
    FONT,
    GRID,
    Scale,
    figure,
    marker,
    nice_ticks,
    padded_range,
)
from service.report.facts import ReportFacts
from service.report.markup import Markup, element, render


def _num(value: object) -> Markup:
    shown = figure(float(value)) if isinstance(value, int | float) and not isinstance(value, bool) else "-"
    return element("td", {"class": "num"}, shown)


def _text(x: float, y: float, content: str, anchor: str = "start") -> Markup:
    return element("text", {"x": x, "y": y, "text-anchor": anchor, **FONT}, content)


def diagnosis_section(facts: ReportFacts) -> Markup:
    """Return the gap table, the learning curve and the search summary (whichever the summary has)."""
    gap = facts.summary.get("fit_gap")
    curve = facts.summary.get("learning_curve")
    search = facts.summary.get("search")
    heading = element("h2", None, "Over- or under-fitting")
    if not gap and not curve and not search:
        return element("section", None, heading,
                       element("p", {"class": "note"}, "No training-fold scores were recorded for this submission."))
    return element("section", None, heading, _gap_table(facts, gap), _curve_part(facts, curve),
                   _search_part(search))


def _gap_table(facts: ReportFacts, gap: dict[str, Any] | None) -> Markup | None:
    if not gap:
        return None
    header = element("tr", None, [element("th", None, h) for h in
                                  ("metric", "train mean", "validation mean", "gap", "reading")])
    rows = []
    for metric in facts.metrics:
        item = (gap.get("metrics") or {}).get(metric) or {}
        rows.append(element("tr", None, element("td", None, metric), _num(item.get("train_mean")),
                            _num(item.get("validation_mean")), _num(item.get("gap")),
                            element("td", None, item.get("reading") or "-")))
    return Markup(element("table", None, header, rows)
                  + element("p", {"class": "note"}, "Gap: how much better the training rows score than the "
                            f"validation rows. {gap.get('note') or ''}"))


def _curve_part(facts: ReportFacts, curve: Sequence[dict[str, Any]] | None) -> Markup | None:
    if not curve:
        return None
    metric = facts.primary_metric
    points = [(float(p["train_rows"]), (p.get("train_mean") or {}).get(metric),
               (p.get("validation_mean") or {}).get(metric)) for p in curve]
    header = element("tr", None, [element("th", None, h) for h in
                                  ("fraction", "training rows", f"train {metric}", f"validation {metric}", "folds")])
    rows = [element("tr", None, _num(p.get("fraction")), _num(p.get("train_rows")),
                    _num((p.get("train_mean") or {}).get(metric)), _num((p.get("validation_mean") or {}).get(metric)),
                    _num(p.get("folds"))) for p in curve]
    order = None
    if facts.summary.get("learning_curve_note"):  # absent from results computed on unshuffled prefixes
        order = element("p", {"class": "note"}, "Each size trains on the first rows of a seeded shuffle of each "
                        "training fold, the same rows for every submission on this dataset (scikit-learn's "
                        "learning_curve with shuffle=True), so the order of the rows in the file plays no part.")
    return Markup(element("h3", None, "Learning curve") + curve_chart(points, metric)
                  + element("table", None, header, rows) + render(order))


def curve_chart(points: Sequence[tuple[float, float | None, float | None]], metric: str,
                width: int = 880, height: int = 300) -> Markup:
    """Train and validation means against training rows: two lines, squares for train, circles for validation."""
    values = [v for _, t, s in points for v in (t, s) if v is not None]
    xs = [x for x, _, _ in points]
    if not values or not xs:
        return element("p", {"class": "note"}, "No learning-curve scores to chart.")
    left, right, top, bottom = 72, 24, 24, 56
    lo, hi = padded_range(values)
    y = Scale(lo, hi, height - bottom, top)
    xlo, xhi = (min(xs), max(xs)) if max(xs) > min(xs) else (min(xs) - 1, max(xs) + 1)
    x = Scale(xlo, xhi, left + 12, width - right - 12)
    parts: list[Markup] = []
    for tick in nice_ticks(lo, hi, 6):
        parts.append(element("line", {"x1": left, "x2": width - right, "y1": y(tick), "y2": y(tick), "stroke": GRID}))
        parts.append(_text(left - 8, y(tick) + 4, figure(tick), "end"))
    for px, _, _ in points:
        parts.append(_text(x(px), height - bottom + 18, figure(px), "middle"))
    parts.append(_text((left + width - right) / 2, height - bottom + 38, "training rows", "middle"))
    for index, (name, color, shape) in enumerate((("train", BASELINE, "square"), ("validation", CANDIDATE, "circle"))):
        line = [(x(px), y(v)) for px, *vals in points if (v := vals[index]) is not None]
        if len(line) > 1:
            parts.append(element("polyline", {"points": " ".join(f"{a:.1f},{b:.1f}" for a, b in line),
                                              "fill": "none", "stroke": color, "stroke-width": 1.5}))
        for (px, *vals), (a, b) in zip([p for p in points if p[1 + index] is not None], line, strict=True):
            parts.append(marker(shape, a, b, color, f"{name}, {figure(px)} training rows: {metric} "
                                f"{figure(vals[index])}"))
        parts.append(marker(shape, left + 6 + 110 * index, height - 8, color, name))
        parts.append(_text(left + 16 + 110 * index, height - 4, name))
    title = f"learning curve: {metric}, train and validation means over the folds"
    return element("svg", {"xmlns": "http://www.w3.org/2000/svg", "viewBox": f"0 0 {width} {height}",
                           "width": "100%", "role": "img", "aria-label": title, "class": "chart"},
                   element("title", None, title), parts)


def _search_part(search: dict[str, Any] | None) -> Markup | None:
    if not search:
        return None
    rows = [element("tr", None, element("td", None, name), element("td", None, str(c.get("value"))),
                    _num(c.get("folds")))
            for name, choices in (search.get("chosen") or {}).items() for c in choices]
    return Markup(
        element("h3", None, "Nested search")
        + element("p", None, f"Scored by {search.get('scoring')} over {search.get('outer_folds')} outer folds: "
                  f"nested estimate {figure(search.get('nested_mean'))}, naive best inner score "
                  f"{figure(search.get('naive_best_inner_mean'))}.")
        + element("table", None, element("tr", None, element("th", None, "parameter"), element("th", None, "value"),
                                         element("th", None, "chosen in folds")), rows)
        + element("p", {"class": "note"}, search.get("note") or "")
    )
