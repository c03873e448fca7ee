"""Render the report page of one submission: verdict first, then the evidence, then provenance.

Plain HTML with inline SVG and an inline style sheet: no script, no external resource, so the
page works offline and under a Content-Security-Policy that allows nothing else.
"""

from __future__ import annotations

import json
from datetime import datetime
from typing import Any

from service.records.engine import as_utc
from service.report.calibration import calibration_section
from service.report.charts import (
    BASELINE,
    CANDIDATE,
    CHAMPION,
    HOLDOUT,
    IntervalRow,
    Series,
    TermRange,
    coefficient_chart,
    figure,
    fold_chart,
    interval_chart,
)
from service.report.facts import ReportFacts
from service.report.fitting import diagnosis_section
from service.report.markup import Markup, element
from service.report.verdict_view import verdict_section

TESTS = {
    "corrected_resampled_t": "corrected resampled t-test (Nadeau & Bengio 2003; repeated form Bouckaert & "
                             "Frank 2004)",
    "five_by_two_cv": "5x2cv paired t-test (Dietterich 1998)",
}
RELEASE_NOTES = {
    "exact": "exact: the holdout score, rounded",
    "ladder": "ladder (Blum & Hardt 2015): the dataset's best holdout figure so far, which moves only when a "
              "submission beats it by more than a threshold, so it need not be this submission's own score",
    "thresholdout": "thresholdout (Dwork et al. 2015): the CV mean, unless it strays from the holdout by more "
                    "than a noisy threshold; then a noisy holdout score",
}
NAIVE_NOTE = ("naive: it treats the folds as independent samples, which they are not (they share training "
              "rows), so read it as too narrow (Bates, Hastie & Tibshirani 2024)")
STYLE = Markup("""
body { font-family: system-ui, sans-serif; color: #222; background: #fafaf7; margin: 0; line-height: 1.45; }
main { max-width: 1040px; margin: 0 auto; padding: 24px 28px 48px; background: #fff; min-height: 100vh; }
h1 { font-size: 1.5rem; margin: 0 0 4px; } h2 { font-size: 1.15rem; margin: 32px 0 8px;
  border-bottom: 1px solid #ddd; padding-bottom: 4px; }
.meta { color: #555; font-size: 0.9rem; margin: 0 0 16px; }
.verdict { border-left: 8px solid #999; padding: 12px 16px; background: #f3f3f3; margin: 16px 0; }
.verdict.pass { border-color: #2e7d32; background: #eef6ee; }
.verdict.fail { border-color: #b3261e; background: #fbeeed; }
.verdict.inconclusive { border-color: #b7791f; background: #fbf5e8; }
.decision { font-size: 1.6rem; font-weight: 700; letter-spacing: 0.06em; text-transform: uppercase; }
.verdict ul { margin: 8px 0 0; padding-left: 20px; }
table { border-collapse: collapse; width: 100%; font-size: 0.9rem; margin: 8px 0; }
th, td { text-align: left; padding: 4px 8px; border-bottom: 1px solid #e4e4e4; vertical-align: top; }
th { background: #f4f4f1; font-weight: 600; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
.outcome { font-weight: 600; } .outcome.fail { color: #b3261e; } .outcome.pass { color: #2e7d32; }
.outcome.inconclusive { color: #8a5a00; } .outcome.skipped { color: #777; }
.note { color: #555; font-size: 0.88rem; } .chart { display: block; margin: 8px 0; }
dl { display: grid; grid-template-columns: 230px 1fr; gap: 4px 12px; font-size: 0.9rem; }
dt { color: #555; } dd { margin: 0; overflow-wrap: anywhere; } code, pre { font-size: 0.85rem; }
pre { background: #f4f4f1; padding: 8px; overflow-x: auto; }
nav.desk { font-size: 0.9rem; color: #555; margin: 0 0 12px; } nav.desk form.inline { display: inline; }
.scroll { overflow-x: auto; }
@media (max-width: 600px) { main { padding: 12px; } dl { grid-template-columns: 1fr; } }
""")


def render_report(facts: ReportFacts, base_url: str = "", nav: Markup | None = None) -> str:
    """Return the whole HTML document of a submission's report; ``nav`` (the desk's links) goes on top."""
    row = facts.submission
    title = row["label"] or row["id"]
    body = element(
        "main", None,
        nav,
        element("h1", None, f"Review of {title}"),
        element("p", {"class": "meta"}, _meta_line(facts)),
        verdict_section(facts),
        _fold_section(facts),
        _interval_section(facts),
        diagnosis_section(facts),
        calibration_section(facts),
        _coefficient_section(facts),
        _provenance_section(facts, base_url),
    )
    head = element("head", None, element("meta", {"charset": "utf-8"}),
                   element("meta", {"name": "viewport", "content": "width=device-width, initial-scale=1"}),
                   element("title", None, f"sealfold review: {title}"), element("style", None, STYLE))
    return "<!doctype html>\n" + element("html", {"lang": "en"}, head, element("body", None, body)) + "\n"


def _meta_line(facts: ReportFacts) -> list[object]:
    row, ds = facts.submission, facts.dataset
    return [
        element("code", None, row["id"]), " on dataset ", element("strong", None, ds["name"]), " (",
        element("code", None, ds["id"]), f", {ds['task']}) \u00b7 submitted by {facts.submitter} on "
        f"{_when(row['created_at'])} \u00b7 state {row['state']}",
    ]


def _when(value: datetime | None) -> str:
    stamped = as_utc(value)
    return "-" if stamped is None else stamped.strftime("%Y-%m-%d %H:%M UTC")


def _cell_label(repeat: int, fold: int, repeats: int) -> str:
    return str(fold) if repeats == 1 else f"r{repeat} f{fold}"


def _fold_section(facts: ReportFacts) -> Markup:
    metric, cells = facts.primary_metric, facts.cells
    by_cell = {(f["repeat"], f["fold"]): f for f in facts.folds}
    repeats = int(facts.submission["config"]["validation"].get("repeats", 1))
    labels = [_cell_label(r, f, repeats) for r, f in cells]

    def score(cell: tuple[int, int], key: str) -> float | None:
        fold = by_cell.get(cell)
        if fold is None or fold["status"] != "ok":
            return None
        value = (fold.get(key) or {}).get(metric)
        return None if value is None else float(value)

    series = [Series("candidate", [score(c, "scores") for c in cells], CANDIDATE, "circle"),
              Series("baseline", [score(c, "baseline_scores") for c in cells], BASELINE, "square")]
    champion = facts.champion
    if champion is not None and champion.fold_scores is not None:
        series.append(Series("champion", [champion.fold_scores.get(c) for c in cells], CHAMPION, "diamond"))
    baseline_name = (facts.summary.get("baseline") or {}).get("estimator", "the baseline")
    notes: list[object] = [f"One point per fold: the test score of the fold's held-out development rows. "
                           f"Dashed: the candidate's mean. Baseline: {baseline_name} on the same folds."]
    if champion is not None:
        which = "the champion it was judged against" if champion.judged_against else "the current champion"
        notes += [f" Champion: {which}, {champion.label or champion.submission_id} (",
                  element("code", None, champion.submission_id), ")."]
        if champion.note:
            notes.append(f" Note: {champion.note}.")
    table_rows = []
    for cell, label in zip(cells, labels, strict=True):
        fold = by_cell.get(cell) or {}
        table_rows.append(element(
            "tr", None, element("td", None, label), _num(fold.get("train_rows")), _num(fold.get("test_rows")),
            _num(score(cell, "scores")), _num(score(cell, "baseline_scores")),
            _num(champion.fold_scores.get(cell) if champion and champion.fold_scores else None),
            _num(fold.get("fit_seconds"), 3),
            element("td", None, fold.get("error") or fold.get("status") or "not recorded")))
    header = element("tr", None, [element("th", None, h) for h in
                                  ("fold", "train rows", "test rows", f"candidate {metric}", f"baseline {metric}",
                                   f"champion {metric}", "fit seconds", "status")])
    direction = "higher is better" if facts.greater_is_better else "lower is better"
    return element("section", None,
                   element("h2", None, f"Fold scores: {metric} ({direction})"),
                   fold_chart(labels, series, metric, facts.greater_is_better),
                   element("p", {"class": "note"}, notes),
                   element("details", None, element("summary", None, "the numbers"),
                           element("div", {"class": "scroll"}, element("table", None, header, table_rows))))


def _interval_section(facts: ReportFacts) -> Markup:
    metric = facts.primary_metric
    summary = (facts.summary.get("summary") or {}).get(metric) or {}
    baseline = ((facts.summary.get("baseline") or {}).get("summary") or {}).get(metric) or {}
    interval = summary.get("naive_interval_95")
    holdout = facts.holdout
    released = (holdout.get("scores") or {}).get(metric) if holdout["released"] else None
    holdout_note = f"released ({holdout['mode']})" if released is not None else (holdout.get("note") or "withheld")
    ladder = holdout.get("ladder")
    holdout_name = "holdout, as released"
    if ladder is not None and ladder["new_best"]:
        holdout_name, holdout_note = "holdout: new best (ladder)", "this submission set the dataset's best so far"
    elif ladder is not None:
        holdout_name = "dataset's best holdout so far, not this model's"
        holdout_note = f"ladder; held by {ladder['held_by']}" if ladder["held_by"] else "ladder"
    rows = [IntervalRow("CV mean, naive 95 % interval", summary.get("mean"), CANDIDATE, "circle",
                        tuple(interval) if interval else None),
            IntervalRow("baseline CV mean", baseline.get("mean"), BASELINE, "square")]
    if facts.champion is not None:
        rows.append(IntervalRow("champion CV mean", facts.champion.mean, CHAMPION, "diamond"))
    rows.append(IntervalRow(holdout_name, released, HOLDOUT, "diamond", note=holdout_note))
    bar = facts.policy.get("bar") if facts.policy_matches_verdict or facts.verdict is None else None
    return element("section", None,
                   element("h2", None, f"Cross-validation against the holdout: {metric}"),
                   interval_chart(rows, metric, bar if isinstance(bar, int | float) else None),
                   element("p", {"class": "note"}, f"The interval is {NAIVE_NOTE}. The holdout figure is what "
                           f"the release policy shows: {RELEASE_NOTES.get(str(holdout['mode']), 'nothing yet')}. "
                           "The raw holdout score stays inside the service."),
                   element("p", {"class": "holdout-summary"}, f"Holdout: {holdout.get('summary') or 'nothing yet'}."),
                   _metrics_table(facts))


def _metrics_table(facts: ReportFacts) -> Markup:
    summary = facts.summary.get("summary") or {}
    baseline = (facts.summary.get("baseline") or {}).get("summary") or {}
    released = (facts.holdout.get("scores") or {}) if facts.holdout["released"] else {}
    header = element("tr", None, [element("th", None, h) for h in
                                  ("metric", "CV mean", "std", "naive 95 % interval", "baseline mean",
                                   "holdout (released)")])
    rows = []
    for metric in facts.metrics:
        item = summary.get(metric) or {}
        interval = item.get("naive_interval_95")
        shown = f"{figure(interval[0])} to {figure(interval[1])}" if interval else "-"
        if interval and item.get("clipped"):
            shown += " (clipped to the metric's range)"
        rows.append(element("tr", None, element("td", None, metric), _num(item.get("mean")), _num(item.get("std")),
                            element("td", {"class": "num"}, shown), _num((baseline.get(metric) or {}).get("mean")),
                            _holdout_cell(facts.holdout, metric, released.get(metric))))
    return element("div", {"class": "scroll"}, element("table", None, header, rows))


def _holdout_cell(holdout: dict[str, Any], metric: str, value: float | None) -> Markup:
    """Show a released figure; a ladder figure this submission did not set is labelled as the dataset's."""
    ladder = holdout.get("ladder")
    if value is None or ladder is None or ladder["metric"] != metric or ladder["new_best"]:
        return _num(value)
    return element("td", {"class": "num"}, f"best so far {figure(float(value), 4)} (not this model's)")


def _coefficient_section(facts: ReportFacts) -> Markup:
    coefficients = facts.summary.get("coefficients")
    heading = element("h2", None, "Coefficient stability")
    if not coefficients or not coefficients.get("terms"):
        return element("section", None, heading,
                       element("p", {"class": "note"}, "No coefficients: the model is not linear, or no fold "
                               "finished."))
    outputs = coefficients.get("outputs") or []
    several = len(outputs) > 1
    terms = coefficients["terms"]

    def name(term: dict[str, Any]) -> str:
        return f"{term['output']}: {term['name']}" if several else str(term["name"])

    ranges = [TermRange(name(t), float(t["mean"]), float(t["min"]), float(t["max"]), t.get("sign_stable"))
              for t in terms if None not in (t.get("mean"), t.get("min"), t.get("max"))]
    unstable = sum(1 for t in terms if not t.get("sign_stable"))
    header = element("tr", None, [element("th", None, h) for h in
                                  ("term", "mean", "std", "min", "max", "sign stable")])
    rows = [element("tr", None, element("td", None, name(t)), _num(t.get("mean")), _num(t.get("std")),
                    _num(t.get("min")), _num(t.get("max")), element("td", None, _stable(t.get("sign_stable"))))
            for t in terms]
    intercepts = [element("tr", None, element("td", None, f"intercept ({i['output']})" if several else "intercept"),
                          _num(i.get("mean")), _num(i.get("std")), _num(i.get("min")), _num(i.get("max")),
                          element("td", None, ""))
                  for i in coefficients.get("intercept") or []]
    return element("section", None, heading,
                   element("p", {"class": "note"},
                           f"{len(terms)} terms over {coefficients.get('folds')} folds; {unstable} change sign or "
                           "vanish in some fold. Lines run from the smallest to the largest value over the folds; "
                           "the dot is the mean; sign-unstable terms are drawn as brown diamonds."),
                   coefficient_chart(ranges[:60]),
                   element("p", {"class": "note"}, f"Showing {min(60, len(ranges))} of {len(ranges)} terms in the "
                           "chart; the table lists all.") if len(ranges) > 60 else None,
                   element("div", {"class": "scroll"}, element("table", None, header, rows, intercepts)))


def _stable(value: bool | None) -> str:
    if value is None:
        return "- (one fold)"
    return "\u2713 yes" if value else "\u2717 no"


def _provenance_section(facts: ReportFacts, base_url: str) -> Markup:
    row = facts.submission
    provenance = facts.summary.get("provenance") or {}
    validation = row["config"]["validation"]
    verdict = facts.verdict or {}
    plan = ", ".join(f"{k} {validation.get(k)}" for k in ("scheme", "folds", "seed", "repeats"))
    if validation.get("plan_overridden"):
        plan += " (overridden: differs from the dataset's fold plan, so no paired comparison exists)"
    items: list[tuple[str, object]] = [
        ("dataset fingerprint", element("code", None, provenance.get("dataset_fingerprint")
                                        or facts.dataset.get("fingerprint"))),
        ("development fingerprint", element("code", None, provenance.get("development_fingerprint")
                                            or facts.dataset.get("development_fingerprint"))),
        ("configuration fingerprint", element("code", None, row["config_fingerprint"])),
        ("fold plan", plan),
        ("judged under policy", "not judged yet" if not facts.verdict else f"version {row.get('policy_version')}"),
        ("policy in force now", f"version {facts.policy['version']}, primary metric {facts.policy['primary_metric']}"),
        ("statistical test", TESTS.get(str(verdict.get("test")), verdict.get("test") or "-")),
        ("champion judged against", element("code", None, verdict.get("champion")) if verdict.get("champion")
         else "none"),
        ("submission document", element("code", None, f"{base_url}/v1/submissions/{row['id']}")),
    ]
    items += [(f"{name} version", str(value)) for name, value in (provenance.get("versions") or {}).items()]
    model = row["config"]["model"]
    return element("section", None, element("h2", None, "Provenance"),
                   element("dl", None, [(element("dt", None, k), element("dd", None, v)) for k, v in items]),
                   element("h2", None, "Configuration"),
                   element("pre", None, json.dumps({"model": model, "metrics": row["config"].get("metrics"),
                                                    "validation": validation}, indent=2, sort_keys=True)))


def _num(value: object, digits: int = 4) -> Markup:
    shown = figure(float(value), digits) if isinstance(value, int | float) and not isinstance(value, bool) else "-"
    if isinstance(value, int) and not isinstance(value, bool) and digits == 4:
        shown = str(value)
    return element("td", {"class": "num"}, shown)
