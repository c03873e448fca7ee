"""Reasons read in plain words first (what was shown, by how much), the test's figures beside them."""

from __future__ import annotations

import numpy as np

from service.gate.policy import default_policy
from service.gate.verdict import ChampionFolds, PlanFacts, judge
from service.report.charts import BASELINE, CANDIDATE, Series, fold_chart
from service.report.reasons import plain_reason, plain_reasons

KEY = ("kfold", 10, 42)
CELLS = [(0, f) for f in range(10)]
PLAN = PlanFacts(KEY, {c: (180, 20) for c in CELLS})
# REFERENCES.md, "Comparison tests": these differences with n_train = 180, n_test = 20 give a corrected
# resampled t of 2.2770, one-sided p = 0.02440 (Nadeau & Bengio 2003).
D = np.array([0.02, 0.01, 0.03, -0.01, 0.02, 0.0, 0.04, 0.01, 0.02, 0.01])
BASE = np.array([0.80, 0.82, 0.78, 0.81, 0.79, 0.80, 0.83, 0.77, 0.80, 0.81])


def _scores(values: np.ndarray) -> dict[tuple[int, int], float]:
    return {c: float(v) for c, v in zip(CELLS, values, strict=True)}


def test_a_baseline_pass_says_by_how_much_and_keeps_the_figures() -> None:
    verdict = judge(default_policy("classification"), _scores(BASE + D), _scores(BASE), None, None, PLAN,
                    policy_version=1)
    reason = next(r for r in plain_reasons(verdict) if r.rule == "baseline")
    assert reason.outcome == "pass"
    assert reason.sentence == f"Better than the baseline by {D.mean():.3g} accuracy; the folds show it clearly."
    assert "corrected resampled t = 2.277" in reason.figures and "p = 0.0244" in reason.figures


def test_a_champion_failure_says_what_was_shown_not_that_p_was_large() -> None:
    rmse = default_policy("regression")  # margin 0 for rmse
    champion = np.array([52.0, 53.5, 51.0, 54.0, 52.5, 53.0, 52.0, 51.5, 53.0, 52.5])
    candidate = champion + np.array([2.4, 2.7, 2.5, 2.6, 2.4, 2.8, 2.5, 2.6, 2.5, 2.6])
    verdict = judge(rmse, _scores(candidate), _scores(candidate * 1.3),
                    ChampionFolds("sub_old", _scores(champion), KEY), None, PLAN, policy_version=1)
    rule = next(r for r in verdict["rules"] if r["rule"] == "champion")
    assert rule["outcome"] == "fail"
    reason = plain_reason(rule, "rmse")
    gap = (candidate - champion).mean()  # 2.56: rmse is lower-is-better, so the candidate is worse by it
    assert f"{gap:.3g}" == "2.56"
    assert reason.sentence == "Worse than the champion by 2.56 rmse, beyond the margin of 0; the folds show it clearly."
    assert reason.figures == rule["sentence"] and "one-sided p" in reason.figures


def test_rules_without_test_figures_keep_their_own_sentence() -> None:
    rule = {"rule": "bar", "outcome": "fail", "sentence": "Misses the bar: CV mean rmse 55, the bar asks for at "
            "most 50.", "figures": {"bar": 50.0, "cv_mean": 55.0}}
    reason = plain_reason(rule, "rmse")
    assert reason.sentence == rule["sentence"] and reason.figures == ""


def test_fold_points_are_not_joined_by_lines() -> None:
    svg = fold_chart(["0", "1", "2"], [Series("candidate", [1.0, 2.0, 1.5], CANDIDATE, "circle"),
                                       Series("baseline", [2.0, 2.5, None], BASELINE, "square")], "rmse", False)
    assert "<polyline" not in svg and "<path" not in svg
    assert svg.count("<circle") == 3 + 1  # three folds and the legend
