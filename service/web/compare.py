"""Two submissions side by side: their fold scores paired on the shared folds, the differences, the test."""

from __future__ import annotations

from typing import Any

from flask import request, url_for
from werkzeug.wrappers import Response

from service import team_scope
from service.api import service_context
from service.errors import InputError, field_error
from service.gate.review_state import holdout_part, policy_in_force
from service.records import datasets, holdout_releases
from service.report.charts import BASELINE, CANDIDATE, Series, figure, fold_chart
from service.report.comparison import Comparison, compare
from service.report.markup import Markup, element
from service.report.reasons import plain_reason
from service.web.guard import desk, signed_in
from service.web.layout import decision_tag, facts, page, table
from service.web.session import DeskSession


@desk.get("/compare")
@signed_in()
def compare_page(session: DeskSession) -> Response:
    engine = service_context().engine
    a_id, b_id = request.args.get("a", ""), request.args.get("b", "")
    if not a_id or not b_id or a_id == b_id:
        raise field_error(InputError, "/a", "pick two different submissions on the board: one as A, one as B")
    a = team_scope.team_submission(engine, session.key, a_id)
    b = team_scope.team_submission(engine, session.key, b_id)
    if a["dataset_id"] != b["dataset_id"]:
        raise field_error(InputError, "/b", "only two submissions of the same dataset can be compared")
    ds = datasets.get_internal(engine, a["dataset_id"])
    assert ds is not None  # a foreign key keeps it
    policy = policy_in_force(engine, ds)
    found = compare(engine, a, b, str(policy["primary_metric"]), bool(policy["greater_is_better"]))
    sides = table("The two submissions", ["", "A", "B"], [
        ["submission", _link(a), _link(b)],
        ["verdict", decision_tag((a.get("verdict") or {}).get("decision")),
         decision_tag((b.get("verdict") or {}).get("decision"))],
        [f"CV mean {found.metric}", _mean(a, found.metric), _mean(b, found.metric)],
        ["holdout (as released)", _holdout(a), _holdout(b)],
    ])
    return page(f"{a['label'] or a['id']} against {b['label'] or b['id']}", session,
                element("p", None, element("a", {"href": url_for("desk.dataset_page", ds_id=ds["id"]) + "#board"},
                                           f"Back to the board of {ds['name']}")),
                sides, _folds(found, a["label"] or a["id"], b["label"] or b["id"]),
                _test(found, float(policy["champion_alpha"]), a["id"]))


def _link(row: dict[str, Any]) -> Markup:
    return element("a", {"href": url_for("desk.report", sub_id=row["id"])}, row["label"] or row["id"])


def _mean(row: dict[str, Any], metric: str) -> str:
    value = (((row.get("cv_summary") or {}).get("summary") or {}).get(metric) or {}).get("mean")
    return figure(value)


def _holdout(row: dict[str, Any]) -> str:
    engine = service_context().engine
    release = None if row.get("held_back") else holdout_releases.get(engine, row["id"])  # service.gate.timing
    part = holdout_part(release, row["state"], row.get("policy_version"))
    return str(part["summary"])


def _folds(found: Comparison, a_name: str, b_name: str) -> Markup:
    heading = element("h2", None, f"Fold scores: {found.metric}")
    if not found.paired or not found.cells:
        return element("section", None, heading, element("p", {"class": "note"}, f"Not paired: {found.note}."))
    labels = [f"r{r} f{f}" if any(c[0] for c in found.cells) else str(f) for r, f in found.cells]
    chart = fold_chart(labels, [Series(f"A: {a_name}", found.a_scores, CANDIDATE, "circle"),
                                Series(f"B: {b_name}", found.b_scores, BASELINE, "square")],
                       found.metric, found.greater_is_better)
    diff_chart = fold_chart(labels, [Series("A better by", found.differences, CANDIDATE, "diamond")],
                            found.metric, True, height=240, axis_label=f"A better by ({found.metric})",
                            zero_line=True)
    rows = [[label, a, b, d] for label, a, b, d in zip(labels, found.a_scores, found.b_scores, found.differences,
                                                       strict=True)]
    return element("section", None, heading, chart,
                   element("p", {"class": "note"}, "One point per shared fold (same rows in both); folds have no "
                           "order, so the points are not joined. Dashed: A's mean."),
                   element("h2", None, "Differences, fold by fold"), diff_chart,
                   element("p", {"class": "note"}, f"How much better A scored than B on each fold, in {found.metric} "
                           "(below the solid zero line: B was better). Dashed: the mean difference."),
                   table("Paired fold scores", ["fold", "A", "B", "A better by"], rows))


def _test(found: Comparison, alpha: float, a_id: str) -> Markup:
    heading = element("h2", None, "The test")
    if found.judged_rule is not None:
        reason = plain_reason(found.judged_rule, found.metric)
        judged, other = ("A", "B") if found.judged_by == a_id else ("B", "A")
        return element("section", None, heading,
                       element("p", None, f"{judged}'s verdict judged it against {other}, the champion then; "
                                          f"what it showed about {judged}:"),
                       element("p", None, element("strong", None, reason.sentence)),
                       element("p", {"class": "note"}, "Figures: ",
                               reason.figures or found.judged_rule.get("sentence")))
    test = found.test
    if test is None:
        return element("section", None, heading, element("p", {"class": "note"},
                                                         f"No test: {found.note or 'nothing to pair'}."))
    d = test.mean_difference
    size = f"{figure(abs(d), 3)} {found.metric}"
    who = "A and B score the same on average" if d == 0 else \
        f"A is better than B by {size} on average" if d > 0 else f"B is better than A by {size} on average"
    if not test.decidable or test.p_two_sided is None:
        said = f"{who}; the test cannot decide: {test.undecidable}."
        numbers = "-"
    else:
        clear = test.p_two_sided < alpha
        said = f"{who}; {'the folds show it clearly' if clear else 'the folds do not settle which is better'}."
        numbers = (f"corrected resampled t = {test.statistic:.3f}, df {test.df}, two-sided p = "
                   f"{test.p_two_sided:.3g} against the policy's level {alpha:g}, over {test.n_differences} "
                   "shared folds")
    return element("section", None, heading,
                   element("p", None, "No verdict compared these two, so the gate's paired test is run here on "
                                      "the same differences (two-sided: neither is the candidate)."),
                   element("p", None, element("strong", None, said)),
                   facts([("figures", numbers)]))
