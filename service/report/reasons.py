"""Say what a verdict's rules showed in plain words, before the figures that show it.

A rule's stored sentence leads with the test's figures ("... t = -7.589, df 4, one-sided p = 0.999
>= 0.05"), which reads as if the rule failed *because* p >= 0.05. ``plain_reason`` turns a rule's
outcome and figures into what was shown -- better or worse, by how much in the metric's units, and
whether the folds settle it -- and keeps the stored sentence as the figures beside it. The verdict
document itself is unchanged: programs keep reading its structured fields.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from service.report.charts import figure


@dataclass(frozen=True)
class PlainReason:
    """One rule read aloud: the plain sentence, and the stored sentence with its figures."""

    rule: str
    outcome: str
    sentence: str
    figures: str


_RULE_NAMES = {"baseline": "against the baseline", "bar": "the bar", "champion": "against the champion",
               "holdout_gap": "holdout against cross-validation", "fold_stability": "fold spread"}


def rule_name(rule: str) -> str:
    """A reader's name for a rule."""
    return _RULE_NAMES.get(rule, rule.replace("_", " "))


def plain_reasons(verdict: dict[str, Any] | None) -> list[PlainReason]:
    """Every rule of a verdict as a plain reason, in the verdict's order (failures first)."""
    if not verdict:
        return []
    metric = str(verdict.get("primary_metric") or "")
    order = {"fail": 0, "inconclusive": 1, "pass": 2, "skipped": 3}
    rules = sorted(verdict.get("rules") or [], key=lambda r: order.get(str(r.get("outcome")), 4))
    return [plain_reason(r, metric) for r in rules]


def plain_reason(rule: dict[str, Any], metric: str) -> PlainReason:
    """Read one rule: a plain sentence when its figures allow one, else its own sentence."""
    name, outcome = str(rule.get("rule", "")), str(rule.get("outcome", ""))
    stored = str(rule.get("sentence", ""))
    figures = rule.get("figures") or {}
    plain = None
    if name == "baseline":
        plain = _versus("the baseline", outcome, figures, metric, margin=None)
    elif name == "champion":
        plain = _versus("the champion", outcome, figures, metric, margin=figures.get("margin"))
    if plain is None:
        return PlainReason(name, outcome, stored, "")
    return PlainReason(name, outcome, plain, stored)


def _versus(other: str, outcome: str, figures: dict[str, Any], metric: str, margin: Any) -> str | None:
    d = figures.get("mean_difference")  # oriented: positive = the candidate is better
    if not isinstance(d, int | float) or isinstance(d, bool) or figures.get("cells") is None:
        return None
    size = f"{figure(abs(float(d)), 3)} {metric}".strip()
    how = f"level with {other}" if d == 0 else f"better than {other} by {size}" if d > 0 else \
        f"worse than {other} by {size}"
    undecidable = figures.get("undecidable")
    if margin is None:
        if outcome == "pass":
            return f"Better than {other} by {size}; the folds show it clearly."
        if outcome == "fail" and d <= 0:
            return f"Not better than {other}: {how}."
        if outcome == "fail":
            return f"Better than {other} by only {size}, which the folds do not show clearly (they disagree too much)."
        return f"Cannot tell whether it beats {other}: {how}, {undecidable or 'and the folds do not settle it'}."
    allowance = f"the margin of {figure(float(margin), 3)}"
    if outcome == "pass":
        return f"Not worse than {other} beyond {allowance}: {how}, and the folds show it clearly."
    if outcome == "fail":
        return f"Worse than {other} by {size}, beyond {allowance}; the folds show it clearly."
    return (f"Too close to call against {other}: {how}, with {allowance}; "
            f"{undecidable or 'the folds do not settle it either way'}.")
