"""The policy form: its fields, a form turned into the policy document the API takes, and back.

The document goes through ``gate.policy.parse_policy`` exactly as a PUT body does, so the form
refuses what the API refuses with the same messages; each message is shown beside the field its
JSON pointer names. A number that does not parse is passed on as the text typed, so the message
quotes it as the API would quote a string.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from service.catalog.metrics import METRICS
from service.errors import FieldProblem
from service.vocabulary import RELEASE_MODES


@dataclass(frozen=True)
class Field:
    """One input: its path in the policy document, label, hint, and kind (number, integer, choice)."""

    path: tuple[str, ...]
    label: str
    hint: str
    kind: str = "number"
    nullable: bool = False

    @property
    def name(self) -> str:
        return ".".join(self.path)


THRESHOLDOUT = ("release", "thresholdout")
FIELDS: tuple[Field, ...] = (
    Field(("primary_metric",), "Primary metric", "the board ranks by it and the rules judge it", "choice"),
    Field(("bar",), "Bar on the CV mean", "an absolute level the CV mean must reach; empty for none", nullable=True),
    Field(("baseline_alpha",), "Level of the test against the baseline", "between 0 and 0.5, e.g. 0.05"),
    Field(("champion_margin",), "Margin allowed behind the champion", "in the metric's units, 0 or more"),
    Field(("champion_alpha",), "Level of the test against the champion", "between 0 and 0.5, e.g. 0.05"),
    Field(("holdout_gap", "k_std"), "Holdout gap: expected spreads allowed", "how many expected spreads the "
          "holdout may stray from the CV mean"),
    Field(("holdout_gap", "floor"), "Holdout gap: added allowance", "in the metric's units, 0 or more"),
    Field(("max_fold_std",), "Largest fold spread allowed", "a standard deviation; empty for no limit",
          nullable=True),
    Field(("release", "mode"), "Holdout release", "exact: the score rounded; ladder: the dataset's best so far; "
          "thresholdout: the CV mean unless the holdout disagrees", "choice"),
    Field(("release", "digits"), "Significant digits released", "1 to 12", "integer"),
    Field(("release", "budget"), "Releases per submitter per window", "how many holdout figures a submitter "
          "may see in one window", "integer"),
    Field(("release", "window_hours"), "Window, in hours", "the rolling window of the budget"),
    Field(("release", "ladder_step"), "Ladder step", "how much a submission must beat the best by; empty for "
          "the parameter-free ladder", nullable=True),
    Field(("release", "ladder_threshold_se"), "Ladder threshold, in standard errors", "parameter-free ladder: how "
          "many standard errors of its gain a submission must beat the best by, e.g. 2"),
    Field(("release", "ladder_shrink_se"), "Ladder shrink, in standard errors", "parameter-free ladder: a new best "
          "is shown as its score less this many standard errors; smaller than the threshold, e.g. 1"),
    Field((*THRESHOLDOUT, "threshold"), "Thresholdout threshold", "in the metric's units; leave all three "
          "thresholdout fields empty for none"),
    Field((*THRESHOLDOUT, "sigma"), "Thresholdout noise", "in the metric's units"),
    Field((*THRESHOLDOUT, "budget"), "Thresholdout budget", "answers per dataset", "integer"),
)


def choices(field: Field, task: str) -> list[str]:
    """The values a choice field offers."""
    if field.path == ("primary_metric",):
        return [m.name for m in METRICS.values() if m.task == task]
    return list(RELEASE_MODES)


def form_values(policy: Mapping[str, Any]) -> dict[str, str]:
    """The form's initial values from a policy document."""
    values = {}
    for field in FIELDS:
        value: Any = policy
        for part in field.path:
            value = value.get(part) if isinstance(value, Mapping) else None
        values[field.name] = "" if value is None else f"{value:g}" if isinstance(value, float) else str(value)
    return values


def document_from_form(form: Mapping[str, str]) -> dict[str, Any]:
    """The policy document a form describes, typed as JSON would type it."""
    document: dict[str, Any] = {}
    thresholdout_empty = all(not form.get(f.name, "").strip() for f in FIELDS if f.path[:2] == THRESHOLDOUT)
    for field in FIELDS:
        if field.path[:2] == THRESHOLDOUT and thresholdout_empty:
            continue
        text = form.get(field.name, "").strip()
        target = document
        for part in field.path[:-1]:
            target = target.setdefault(part, {})
        target[field.path[-1]] = _typed(field, text)
    if thresholdout_empty:
        document.setdefault("release", {})["thresholdout"] = None
    return document


def _typed(field: Field, text: str) -> Any:
    if field.kind == "choice":
        return text
    if not text:
        return None if field.nullable else text
    try:
        number = float(text)
    except ValueError:
        return text
    if field.kind == "integer" and number.is_integer():
        return int(number)
    return number


def problems_by_field(problems: list[FieldProblem]) -> tuple[dict[str, list[str]], list[str]]:
    """Each problem under the form field its pointer names (or the nearest one), and those for the whole form."""
    names = {f.name for f in FIELDS}
    placed: dict[str, list[str]] = {}
    loose: list[str] = []
    for problem in problems:
        name = problem.pointer.strip("/").replace("/", ".")
        if name not in names:
            name = next((f.name for f in FIELDS if f.name.startswith(f"{name}.")), "") if name else ""
        if name:
            placed.setdefault(name, []).append(problem.detail)
        else:
            loose.append(problem.detail)
    return placed, loose
