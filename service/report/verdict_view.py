"""The verdict box of the report page: the decision, each rule's plain reason first and its figures beside it."""

from __future__ import annotations

from service.report.facts import ReportFacts
from service.report.markup import Markup, element
from service.report.reasons import plain_reasons, rule_name


def verdict_section(facts: ReportFacts) -> Markup:
    """The verdict at the top of the report: the decision, then each rule in plain words with its figures."""
    verdict, row = facts.verdict, facts.submission
    if verdict is None:
        if row["state"] == "failed":
            text = f"No verdict: the submission failed. {row['error'] or ''}".strip()
        elif row["state"] == "canceled":
            text = "No verdict: the submission was canceled."
        else:
            text = f"No verdict yet: the submission is {row['state']}."
        return element("section", {"class": "verdict none"}, element("div", {"class": "decision"}, "no verdict"),
                       element("p", None, text))
    decision = str(verdict.get("decision", ""))
    plain = plain_reasons(verdict)
    if not plain:  # a verdict without rules: its reasons as they are
        items = [element("li", None, reason) for reason in verdict.get("reasons", [])]
    else:
        items = [element("li", None, element("span", {"class": f"outcome {r.outcome}"}, f"{rule_name(r.rule)}: "),
                         r.sentence, element("br", None) if r.figures else None,
                         element("span", {"class": "note"}, f"Figures: {r.figures}") if r.figures else None)
                 for r in plain if r.outcome != "skipped"]
    skipped = [rule_name(r.rule) for r in plain if r.outcome == "skipped"]
    return element("section", {"class": f"verdict {decision}"},
                   element("div", {"class": "decision"}, decision),
                   element("ul", None, items),
                   element("p", {"class": "note"}, f"Not checked (the policy sets no such rule, or nothing to "
                                                   f"check yet): {', '.join(skipped)}.") if skipped else None)
