"""Two submissions of one dataset side by side: fold scores paired on the shared folds, and the test.

Folds pair only when both submissions ran the same fold plan (scheme, folds, seed, repeats): only
then does a (repeat, fold) cell hold the same rows in both. The test shown is the one a verdict
ran between them when one judged the other as its champion; otherwise the gate's own paired test
(corrected resampled t, Nadeau & Bengio 2003) run here on the same differences, two-sided because
neither submission is the candidate. Fold scores come from development rows only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import Engine

from service.gate.statistics import PairedTest, corrected_resampled_t
from service.records import submissions

Cell = tuple[int, int]
_PLAN_KEYS = ("scheme", "folds", "seed", "repeats")


@dataclass(frozen=True)
class Comparison:
    """What the compare page shows, already read and computed."""

    metric: str
    greater_is_better: bool
    paired: bool
    note: str
    cells: list[Cell]
    a_scores: list[float]
    b_scores: list[float]
    judged_rule: dict[str, Any] | None  # a verdict's champion rule between the two, when one exists
    judged_by: str | None  # the submission whose verdict that rule belongs to
    test: PairedTest | None  # otherwise the test run here

    @property
    def differences(self) -> list[float]:
        """A - B per shared cell, oriented so that positive means A is better."""
        sign = 1.0 if self.greater_is_better else -1.0
        return [sign * (a - b) for a, b in zip(self.a_scores, self.b_scores, strict=True)]


def compare(engine: Engine, a: dict[str, Any], b: dict[str, Any], metric: str, greater_is_better: bool) -> Comparison:
    """Pair submissions ``a`` and ``b`` (rows of one dataset, already team-checked) on ``metric``."""
    judged_rule, judged_by = _judged(a, b, metric)
    plan_a = {k: a["config"]["validation"].get(k) for k in _PLAN_KEYS}
    plan_b = {k: b["config"]["validation"].get(k) for k in _PLAN_KEYS}
    if plan_a != plan_b:
        return Comparison(metric, greater_is_better, False, "they ran different fold plans, so no fold holds the "
                          "same rows in both and their fold scores cannot be paired", [], [], [], judged_rule,
                          judged_by, None)
    folds_a, folds_b = _scores(engine, a["id"], metric), _scores(engine, b["id"], metric)
    cells = sorted(set(folds_a) & set(folds_b))
    a_scores = [folds_a[c][0] for c in cells]
    b_scores = [folds_b[c][0] for c in cells]
    test = None
    note = ""
    if len(cells) < 2:
        note = f"they share {len(cells)} scored fold(s); a paired test needs at least 2"
    else:
        sign = 1.0 if greater_is_better else -1.0
        d = sign * (np.array(a_scores) - np.array(b_scores))
        n_train = float(np.mean([folds_a[c][1] for c in cells]))
        n_test = float(np.mean([folds_a[c][2] for c in cells]))
        test = corrected_resampled_t(d, n_train, n_test)
    return Comparison(metric, greater_is_better, True, note, cells, a_scores, b_scores, judged_rule, judged_by, test)


def _scores(engine: Engine, sub_id: str, metric: str) -> dict[Cell, tuple[float, int, int]]:
    found = {}
    for f in submissions.fold_rows(engine, sub_id):
        value = (f.get("scores") or {}).get(metric) if f["status"] == "ok" else None
        if value is not None:
            found[(int(f["repeat"]), int(f["fold"]))] = (float(value), int(f["train_rows"] or 0),
                                                        int(f["test_rows"] or 0))
    return found


def _judged(a: dict[str, Any], b: dict[str, Any], metric: str) -> tuple[dict[str, Any] | None, str | None]:
    for judged, other in ((a, b), (b, a)):
        verdict = judged.get("verdict") or {}
        if verdict.get("champion") == other["id"] and verdict.get("primary_metric") == metric:
            for rule in verdict.get("rules") or []:
                if rule.get("rule") == "champion":
                    return rule, str(judged["id"])
    return None, None
