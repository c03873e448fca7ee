"""The report's calibration section: the reliability curve of the out-of-fold probabilities and its ECE.

The summary pools every fold's bin counts and sums (``worker.learning.calibration``); this draws
the pooled curve against the diagonal of perfect calibration, and each fold's own points as small
unjoined markers (a line joins points of the one pooled curve only, never points of different
folds). The table under it lists the bins, so every drawn point can be read as a number.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.report.charts import BASELINE, CANDIDATE, FONT, GRID, MUTED, Scale, figure, marker
from service.report.facts import ReportFacts
from service.report.markup import Markup, element

KINDS = {
    "positive_class": "the predicted probability of class {positive} against the fraction of rows of that class",
    "top_label": "each row's largest predicted probability (the confidence in its most probable class) against "
                 "the fraction of rows whose most probable class was right",
}


def calibration_section(facts: ReportFacts) -> Markup | None:
    """Return the section, or None for a regression; a classifier without probabilities gets a note."""
    if facts.dataset.get("task") != "classification":
        return None
    heading = element("h2", None, "Calibration of the predicted probabilities")
    calibration = facts.summary.get("calibration")
    if not calibration:
        return element("section", None, heading, element(
            "p", {"class": "note"}, "No reliability curve: the model gives no probabilities, or its folds were "
            "scored before the service binned them."))
    kind = KINDS.get(str(calibration.get("kind")), "")
    what = kind.format(positive=calibration.get("positive_class"))
    summary = element(
        "p", None, "Expected calibration error (ECE) ", element("strong", None, figure(calibration.get("ece"))),
        f" over {calibration.get('rows')} out-of-fold predictions pooled from every fold"
        f"{' of every repeat (each row once per repeat)' if _repeats(calibration) > 1 else ''}: the mean, "
        "weighted by the rows in each bin, of |fraction observed - mean predicted|. 0 is perfect.")
    bins = element("p", {"class": "note"}, f"Bins: {calibration.get('binning')}. Shown: {what}. ECE depends on the "
                   "bins chosen; with few rows in a bin its point is noisy (hover a point for its rows).")
    return element("section", None, heading, summary, reliability_chart(calibration), bins, _table(calibration))


def _repeats(calibration: Mapping[str, Any]) -> int:
    return len({f.get("repeat") for f in calibration.get("folds") or []})


def reliability_chart(calibration: Mapping[str, Any], size: int = 360) -> Markup:
    """Mean predicted (x) against fraction observed (y), both on [0, 1], with the diagonal."""
    left, right, top, bottom = 56, 200, 16, 48
    width, height = size + left + right, size + top + bottom
    x, y = Scale(0.0, 1.0, left, left + size), Scale(0.0, 1.0, top + size, top)
    parts: list[Markup] = []
    for tick in (0.0, 0.2, 0.4, 0.6, 0.8, 1.0):
        parts.append(element("line", {"x1": x(0), "x2": x(1), "y1": y(tick), "y2": y(tick), "stroke": GRID}))
        parts.append(element("line", {"x1": x(tick), "x2": x(tick), "y1": y(0), "y2": y(1), "stroke": GRID}))
        parts.append(_text(x(0) - 8, y(tick) + 4, figure(tick), "end"))
        parts.append(_text(x(tick), y(0) + 18, figure(tick), "middle"))
    parts.append(_text(x(0.5), height - 8, "mean predicted probability", "middle"))
    parts.append(element("text", {"x": 14, "y": y(0.5), "text-anchor": "middle", **FONT,
                                  "transform": f"rotate(-90 14 {y(0.5):.1f})"}, "fraction observed"))
    parts.append(element("line", {"x1": x(0), "y1": y(0), "x2": x(1), "y2": y(1), "stroke": MUTED,
                                  "stroke-dasharray": "4 4"}, element("title", None, "perfect calibration")))
    for fold in calibration.get("folds") or []:
        for predicted, observed, rows in fold.get("points") or []:
            parts.append(marker("square", x(predicted), y(observed), BASELINE,
                                f"repeat {fold.get('repeat')}, fold {fold.get('fold')}: mean predicted "
                                f"{figure(predicted)}, observed {figure(observed)}, {rows} rows", size=2.5))
    pooled = [(b["mean_predicted"], b["fraction_observed"], b["count"]) for b in calibration.get("curve") or []
              if b.get("count")]
    if len(pooled) > 1:
        parts.append(element("polyline", {"points": " ".join(f"{x(p):.1f},{y(o):.1f}" for p, o, _ in pooled),
                                          "fill": "none", "stroke": CANDIDATE, "stroke-width": 1.5}))
    for predicted, observed, rows in pooled:
        parts.append(marker("circle", x(predicted), y(observed), CANDIDATE, f"pooled: mean predicted "
                            f"{figure(predicted)}, observed {figure(observed)}, {rows} rows"))
    legend_x = left + size + 24
    for index, (name, color, shape, small) in enumerate((("pooled over the folds", CANDIDATE, "circle", 5.0),
                                                         ("one fold (not joined)", BASELINE, "square", 2.5))):
        parts.append(marker(shape, legend_x + 6, top + 20 + 22 * index, color, name, size=small))
        parts.append(_text(legend_x + 16, top + 24 + 22 * index, name))
    title = "reliability curve of the out-of-fold predicted probabilities"
    return element("svg", {"xmlns": "http://www.w3.org/2000/svg", "viewBox": f"0 0 {width} {height}",
                           "width": "100%", "style": f"max-width: {width}px", "role": "img", "aria-label": title,
                           "class": "chart"}, element("title", None, title), parts)


def _table(calibration: Mapping[str, Any]) -> Markup:
    header = element("tr", None, [element("th", None, h) for h in
                                  ("bin", "rows", "mean predicted", "fraction observed", "observed - predicted")])
    rows = []
    for b in calibration.get("curve") or []:
        gap = (b["fraction_observed"] - b["mean_predicted"]) if b.get("count") else None
        rows.append(element("tr", None, element("td", None, f"{b['low']:.1f} - {b['high']:.1f}"),
                            _num(b.get("count")), _num(b.get("mean_predicted")), _num(b.get("fraction_observed")),
                            _num(gap)))
    return element("table", None, header, rows)


def _num(value: object) -> Markup:
    shown = figure(float(value)) if isinstance(value, int | float) and not isinstance(value, bool) else "-"
    return element("td", {"class": "num"}, shown)


def _text(x: float, y: float, content: str, anchor: str = "start") -> Markup:
    return element("text", {"x": x, "y": y, "text-anchor": anchor, **FONT}, content)
