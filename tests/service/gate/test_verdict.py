"""Verdicts on synthetic fold scores: every rule's branches, orientation, and the decision."""

from __future__ import annotations

import json
from dataclasses import replace
from typing import Any

import numpy as np
import pytest
from scipy import stats as sps

from service.gate.policy import HoldoutGap, Policy, default_policy
from service.gate.statistics import FIVE_BY_TWO_CV, without_largest
from service.gate.verdict import Cell, ChampionFolds, PlanFacts, TrimmedHoldout, judge, trimmed_rows

KEY = ("kfold", 10, 42)
CELLS = [(0, f) for f in range(10)]
PLAN = PlanFacts(KEY, {c: (180, 20) for c in CELLS})
# REFERENCES.md, "Comparison tests": differences with n_train = 180, n_test = 20 -> corrected resampled
# t = 2.2770, one-sided p = 0.02440 (*computed*, Nadeau & Bengio 2003).
D = [0.02, 0.01, 0.03, -0.01, 0.02, 0.0, 0.04, 0.01, 0.02, 0.01]
BASE_ACC = [0.80, 0.82, 0.78, 0.81, 0.79, 0.80, 0.83, 0.77, 0.80, 0.81]
ACCURACY = default_policy("classification")
RMSE = default_policy("regression")


def _scores(values: list[float] | np.ndarray, cells: list[Cell] = CELLS) -> dict[Cell, float]:
    return {c: float(v) for c, v in zip(cells, values, strict=True)}


def _rule(verdict: dict[str, Any], name: str) -> dict[str, Any]:
    return next(r for r in verdict["rules"] if r["rule"] == name)


def _judge(policy: Policy, candidate: dict[Cell, float], baseline: dict[Cell, float], *,
           champion: ChampionFolds | None = None, holdout: float | None = None, plan: PlanFacts = PLAN,
           ) -> dict[str, Any]:
    verdict = judge(policy, candidate, baseline, champion, holdout, plan, policy_version=4)
    json.dumps(verdict, allow_nan=False)  # a stored document: plain JSON, no NaN
    return verdict


def test_baseline_rule_reproduces_the_worked_value_and_passes() -> None:
    candidate = _scores(np.add(BASE_ACC, D))
    v = _judge(ACCURACY, candidate, _scores(BASE_ACC))
    rule = _rule(v, "baseline")
    assert rule["outcome"] == "pass"
    assert round(rule["figures"]["t"], 4) == 2.2770  # REFERENCES.md, *computed*
    assert round(rule["figures"]["p_one_sided"], 5) == 0.02440
    assert rule["figures"]["p_one_sided"] == pytest.approx(sps.t.sf(rule["figures"]["t"], 9), rel=1e-9)
    assert (rule["figures"]["n_train"], rule["figures"]["n_test"]) == (180.0, 20.0)
    assert rule["sentence"].startswith("Beats the baseline: mean accuracy")
    assert v["decision"] == "pass" and v["test"] == "corrected_resampled_t" and v["policy_version"] == 4
    assert set(v) == {"decision", "reasons", "rules", "primary_metric", "test", "policy_version", "champion"}
    assert [r["rule"] for r in v["rules"]] == ["baseline", "bar", "champion", "champion_holdout", "holdout_gap",
                                               "fold_stability"]


def test_baseline_rule_fails_at_a_stricter_level() -> None:
    # Same evidence, level 0.01: p = 0.0244 does not reach it; the burden of proof is on the candidate.
    v = _judge(replace(ACCURACY, baseline_alpha=0.01), _scores(np.add(BASE_ACC, D)), _scores(BASE_ACC))
    assert _rule(v, "baseline")["outcome"] == "fail" and v["decision"] == "fail"
    assert "p = 0.0244 >= 0.01" in _rule(v, "baseline")["sentence"]
    assert v["reasons"][0].startswith("Does not beat the baseline")


def test_orientation_follows_the_metric_direction() -> None:
    # rmse: lower is better, so the same numbers the other way round beat the baseline.
    base = _scores(np.add(BASE_ACC, D))
    lower = _scores(BASE_ACC)
    assert _rule(_judge(RMSE, lower, base), "baseline")["outcome"] == "pass"
    assert _rule(_judge(RMSE, base, lower), "baseline")["outcome"] == "fail"
    assert _rule(_judge(ACCURACY, lower, base), "baseline")["outcome"] == "fail"


def test_a_copy_of_the_baseline_fails_rather_than_dividing_by_zero() -> None:
    # A Dummy candidate scores exactly like the Dummy baseline: zero spread, no fold favours it.
    v = _judge(ACCURACY, _scores(BASE_ACC), _scores(BASE_ACC))
    rule = _rule(v, "baseline")
    assert rule["outcome"] == "fail" and rule["figures"]["t"] is None
    assert "undefined (0/0)" in rule["sentence"]


def test_the_same_improvement_on_every_fold_is_inconclusive() -> None:
    v = _judge(ACCURACY, _scores(np.add(BASE_ACC, 0.05)), _scores(BASE_ACC))
    rule = _rule(v, "baseline")
    assert rule["outcome"] == "inconclusive" and "infinite" in rule["sentence"]
    assert v["decision"] == "inconclusive"


def test_one_shared_fold_is_inconclusive() -> None:
    v = _judge(ACCURACY, _scores([0.9], CELLS[:1]), _scores(BASE_ACC))
    assert _rule(v, "baseline")["outcome"] == "inconclusive"
    assert "share 1 scored fold(s)" in _rule(v, "baseline")["sentence"]


def test_bar_in_both_directions() -> None:
    candidate = _scores(np.add(BASE_ACC, D))  # mean 0.816
    assert _rule(_judge(replace(ACCURACY, bar=0.81), candidate, _scores(BASE_ACC)), "bar")["outcome"] == "pass"
    missed = _judge(replace(ACCURACY, bar=0.82), candidate, _scores(BASE_ACC))
    assert _rule(missed, "bar")["outcome"] == "fail" and missed["decision"] == "fail"
    assert _rule(missed, "bar")["sentence"] == "Misses the bar: CV mean accuracy 0.816, the bar asks for at least 0.82."
    rmse = _scores(BASE_ACC)  # mean 0.801
    assert _rule(_judge(replace(RMSE, bar=0.81), rmse, candidate), "bar")["outcome"] == "pass"
    assert _rule(_judge(replace(RMSE, bar=0.80), rmse, candidate), "bar")["outcome"] == "fail"
    assert _rule(_judge(ACCURACY, candidate, _scores(BASE_ACC)), "bar")["outcome"] == "skipped"


def _champion(values: list[float] | np.ndarray, key: tuple[str, int, int] = KEY,
              cells: list[Cell] = CELLS) -> ChampionFolds:
    return ChampionFolds("sub_champ", _scores(values, cells), key)


def test_champion_rule_passes_within_the_margin() -> None:
    # Candidate a little below the champion on average (0.005), margin 0.01: non-inferiority shown?
    rng = np.random.default_rng(3)
    champ = np.add(BASE_ACC, 0.05)
    candidate = champ - 0.002 + rng.normal(0, 0.002, 10)
    v = _judge(ACCURACY, _scores(candidate), _scores(BASE_ACC), champion=_champion(champ))
    rule = _rule(v, "champion")
    assert rule["outcome"] == "pass", rule["sentence"]
    assert rule["figures"]["margin"] == 0.01 and rule["figures"]["mean_difference"] < 0
    assert rule["figures"]["lower_bound"] > -0.01  # the bound on the difference clears -margin
    assert v["champion"] == "sub_champ"
    # The test ran on d + margin: its p is scipy's t.sf on that statistic.
    assert rule["figures"]["p_one_sided"] == pytest.approx(sps.t.sf(rule["figures"]["t"], 9), rel=1e-9)


def test_champion_rule_fails_beyond_the_margin() -> None:
    champ = np.add(BASE_ACC, D)
    candidate = champ - 0.04 + np.array(D) / 4
    v = _judge(ACCURACY, _scores(candidate), _scores(np.subtract(BASE_ACC, 0.1)), champion=_champion(champ))
    rule = _rule(v, "champion")
    assert rule["outcome"] == "fail" and v["decision"] == "fail"
    assert rule["sentence"].startswith("Worse than champion sub_champ by more than the margin 0.01")
    assert v["reasons"][0] == rule["sentence"]


def test_champion_with_a_margin_of_zero_needs_evidence_to_pass_and_to_fail() -> None:
    champ = np.add(BASE_ACC, D)
    rng = np.random.default_rng(5)
    candidate = champ + rng.normal(0, 0.01, 10)  # no real difference
    v = _judge(replace(ACCURACY, champion_margin=0.0), _scores(candidate), _scores(BASE_ACC),
               champion=_champion(champ))
    # Neither shown as good as the champion nor shown worse: inconclusive, never a silent pass.
    assert _rule(v, "champion")["outcome"] == "inconclusive" and v["decision"] == "inconclusive"


def test_champion_on_another_fold_plan_is_inconclusive_never_a_pass() -> None:
    champ = np.add(BASE_ACC, D)
    plan = replace(PLAN, key=("kfold", 5, 42), overridden=True)
    v = _judge(ACCURACY, _scores(champ + 0.1), _scores(BASE_ACC), champion=_champion(champ), plan=plan)
    rule = _rule(v, "champion")
    assert rule["outcome"] == "inconclusive" and v["decision"] == "inconclusive"
    assert "overrode the dataset's fold plan" in rule["sentence"] and "no paired test exists" in rule["sentence"]


def test_champion_is_paired_on_shared_cells_only() -> None:
    # The champion ran 2 repeats; the candidate 1: the pairing uses repeat 0.
    cells2 = CELLS + [(1, f) for f in range(10)]
    champ = list(np.add(BASE_ACC, D)) + [0.1] * 10  # repeat 1 would sink the champion if it were used
    v = _judge(ACCURACY, _scores(np.add(BASE_ACC, D)), _scores(BASE_ACC), champion=_champion(champ, cells=cells2))
    assert _rule(v, "champion")["figures"]["cells"] == 10
    # No shared cells at all: inconclusive.
    other = _champion(np.add(BASE_ACC, D), cells=[(1, f) for f in range(10)])
    assert _rule(_judge(ACCURACY, _scores(np.add(BASE_ACC, D)), _scores(BASE_ACC), champion=other),
                 "champion")["outcome"] == "inconclusive"


def test_no_champion_is_skipped() -> None:
    v = _judge(ACCURACY, _scores(np.add(BASE_ACC, D)), _scores(BASE_ACC))
    assert _rule(v, "champion")["outcome"] == "skipped" and v["champion"] is None
    assert len(set(v["reasons"])) == len(v["reasons"])  # each rule says its own sentence, none twice


def _interval_half_width(values: list[float] | np.ndarray, n_train: float, n_test: float, n_holdout: float,
                         rate: float) -> float:
    """The t prediction interval written out (Nadeau & Bengio 2003 variance term, *computed* with scipy)."""
    j = len(values)
    factor = 1 / j + n_test / n_train + n_test / n_holdout
    return float(sps.t.isf(rate / 2, j - 1) * np.std(values, ddof=1) * np.sqrt(factor))


def test_holdout_gap_pass_fail_skip_and_never_shows_the_holdout() -> None:
    values = np.add(BASE_ACC, D)
    candidate = _scores(values)  # mean 0.816, fold std 0.02366
    policy = replace(ACCURACY, holdout_gap=HoldoutGap(2.0, 0.01))  # nominal rate 2 * (1 - Phi(2)) = 4.55 %
    # Without a holdout size the holdout counts as one more fold of 20 rows: 1/10 + 20/180 + 1 (*computed*).
    allowed = _interval_half_width(values, 180, 20, 20, 2 * sps.norm.sf(2.0)) + 0.01
    assert allowed == pytest.approx(0.07041, abs=1e-5)
    inside = _judge(policy, candidate, _scores(BASE_ACC), holdout=0.8357)
    rule = _rule(inside, "holdout_gap")
    assert rule["outcome"] == "pass"
    assert rule["figures"]["allowed_gap"] == pytest.approx(allowed)
    assert rule["figures"]["false_fail_rate"] == pytest.approx(0.0455, abs=1e-4)
    assert (rule["figures"]["df"], rule["figures"]["t_quantile"]) == (9, pytest.approx(sps.t.isf(0.0455 / 2, 9),
                                                                                       rel=1e-3))
    outside = _judge(policy, candidate, _scores(BASE_ACC), holdout=0.7357)
    assert _rule(outside, "holdout_gap")["outcome"] == "fail" and outside["decision"] == "fail"
    for verdict in (inside, outside):
        text = json.dumps(verdict)
        assert "0.8357" not in text and "0.7357" not in text and "0.0197" not in text
    assert _rule(_judge(policy, candidate, _scores(BASE_ACC)), "holdout_gap")["outcome"] == "skipped"


def test_holdout_gap_is_the_t_prediction_interval_with_the_fold_overlap_term() -> None:
    # 10 folds of 20 test rows trained on 180 and a holdout of 50 rows: the variance of (holdout - CV mean)
    # in fold variances is 1/10 (the mean) + 20/180 (Nadeau & Bengio 2003's correlated-fold term) +
    # 20/50 (a holdout score on 50 rows), and the quantile is Student's t with 9 df at the nominal
    # rate 2 * (1 - Phi(3)) = 0.27 % (*computed* with scipy).
    values = np.add(BASE_ACC, D)
    candidate = _scores(values)
    std = float(np.std(values, ddof=1))
    policy = replace(ACCURACY, holdout_gap=HoldoutGap(3.0, 0.0))
    scaled = _judge(policy, candidate, _scores(BASE_ACC), holdout=0.82, plan=replace(PLAN, holdout_rows=50))
    figures = _rule(scaled, "holdout_gap")["figures"]
    assert figures["expected_spread"] == pytest.approx(std * np.sqrt(1 / 10 + 20 / 180 + 20 / 50))
    assert figures["t_quantile"] == pytest.approx(sps.t.isf(sps.norm.sf(3.0), 9))
    assert figures["t_quantile"] == pytest.approx(4.094, abs=1e-3)  # *computed*: t_9 at 0.99865
    assert figures["allowed_gap"] == pytest.approx(_interval_half_width(values, 180, 20, 50, 2 * sps.norm.sf(3.0)))
    assert figures["false_fail_rate"] == pytest.approx(0.0027, abs=1e-5)
    # A holdout much larger than a fold narrows the allowance; the correlated-fold term keeps it above
    # what independent folds would give.
    wide = _rule(_judge(policy, candidate, _scores(BASE_ACC), holdout=0.82, plan=replace(PLAN, holdout_rows=2000)),
                 "holdout_gap")["figures"]["allowed_gap"]
    assert wide < figures["allowed_gap"]
    assert wide > sps.t.isf(sps.norm.sf(3.0), 9) * std * np.sqrt(1 / 10 + 20 / 2000)


def test_a_few_extreme_holdout_rows_do_not_fail_the_consistency_rule() -> None:
    # rmse folds around 50; a holdout rmse of 90 is far outside, but 52.9 once its largest losses are set
    # aside: a pass that says why. A holdout still outside without them fails.
    values = [50.0, 52.0, 49.0, 51.0, 48.0, 50.5, 51.5, 49.5, 50.0, 52.5]
    candidate = _scores(values)
    plan = replace(PLAN, holdout_rows=200)
    assert trimmed_rows(200) == 2 and trimmed_rows(19) == 0 and trimmed_rows(10_000) == 5
    rescued = _judge_trimmed(candidate, plan, 90.123, TrimmedHoldout(52.917, 2))
    rule = _rule(rescued, "holdout_gap")
    assert rule["outcome"] == "pass" and "2 largest per-row loss(es) are set aside" in rule["sentence"]
    text = json.dumps(rule)
    assert rule["figures"]["rows_set_aside"] == 2 and "52.917" not in text and "90.123" not in text
    still = _judge_trimmed(candidate, plan, 90.0, TrimmedHoldout(80.0, 2))
    assert _rule(still, "holdout_gap")["outcome"] == "fail"
    assert _rule(_judge_trimmed(candidate, plan, 90.0, None), "holdout_gap")["outcome"] == "fail"


def test_without_largest_recomputes_mean_and_root_mean_metrics() -> None:
    # The worked squared errors of REFERENCES.md (y = [3, -0.5, 2, 7], y_hat = [2.5, 0, 2, 8]): MSE 0.375;
    # without the largest (1.0) the mean of [0.25, 0.25, 0] is 1/6 and its root 0.408248 (*computed*).
    squared = np.square(np.array([3, -0.5, 2, 7]) - np.array([2.5, 0.0, 2, 8]))
    assert without_largest(squared, "mean", 0) == pytest.approx(0.375)
    assert without_largest(squared, "mean", 1) == pytest.approx(1 / 6)
    assert without_largest(squared, "sqrt_of_mean", 1) == pytest.approx(0.408248, abs=1e-6)


def _judge_trimmed(candidate: dict[Cell, float], plan: PlanFacts, holdout: float,
                   trimmed: TrimmedHoldout | None) -> dict[str, Any]:
    verdict = judge(RMSE, candidate, candidate, None, holdout, plan, policy_version=1, holdout_trimmed=trimmed)
    json.dumps(verdict, allow_nan=False)
    return verdict


def test_fold_stability() -> None:
    candidate = _scores(np.add(BASE_ACC, D))  # fold std ~0.0206
    assert _rule(_judge(replace(ACCURACY, max_fold_std=0.03), candidate, _scores(BASE_ACC)),
                 "fold_stability")["outcome"] == "pass"
    unstable = _judge(replace(ACCURACY, max_fold_std=0.01), candidate, _scores(BASE_ACC))
    assert _rule(unstable, "fold_stability")["outcome"] == "fail" and unstable["decision"] == "fail"
    assert _rule(_judge(ACCURACY, candidate, _scores(BASE_ACC)), "fold_stability")["outcome"] == "skipped"


def test_fail_outranks_inconclusive_and_reasons_list_failures_first() -> None:
    champ = np.add(BASE_ACC, D)
    plan = replace(PLAN, key=("kfold", 5, 42), overridden=True)
    v = _judge(replace(ACCURACY, bar=0.9), _scores(champ), _scores(BASE_ACC), champion=_champion(champ),
               plan=plan)
    outcomes = [r["outcome"] for r in v["rules"]]
    assert "fail" in outcomes and "inconclusive" in outcomes and v["decision"] == "fail"
    assert v["reasons"][0].startswith("Misses the bar")
    assert v["reasons"][1].startswith("Cannot compare with champion")
    assert len(v["reasons"]) == 6


FIVE_BY_TWO = [(r, f) for r in range(5) for f in range(2)]
PLAN_5X2 = PlanFacts(("kfold", 2, 42), {c: (100, 100) for c in FIVE_BY_TWO}, overridden=True, test=FIVE_BY_TWO_CV)
# REFERENCES.md, 5x2cv check (Dietterich 1998, *computed*): t = 1.79284, two-sided p = 0.13298.
P_5X2 = [0.03, 0.01, 0.02, 0.04, 0.0, 0.02, 0.05, 0.01, 0.02, 0.02]


def test_five_by_two_uses_dietterichs_test_with_the_one_sided_p() -> None:
    base = [0.7] * 10
    candidate = _scores(np.add(base, P_5X2), FIVE_BY_TWO)
    at_05 = _judge(ACCURACY, candidate, _scores(base, FIVE_BY_TWO), plan=PLAN_5X2)
    rule = _rule(at_05, "baseline")
    assert at_05["test"] == "five_by_two_cv"
    assert round(rule["figures"]["t"], 5) == 1.79284
    assert round(rule["figures"]["p_two_sided"], 5) == 0.13298
    assert rule["figures"]["p_one_sided"] == pytest.approx(0.13298 / 2, abs=1e-5)  # halved: t > 0
    assert rule["outcome"] == "fail"  # 0.0665 >= 0.05
    at_10 = _judge(replace(ACCURACY, baseline_alpha=0.1), candidate, _scores(base, FIVE_BY_TWO), plan=PLAN_5X2)
    assert _rule(at_10, "baseline")["outcome"] == "pass"


def test_five_by_two_with_a_missing_cell_is_inconclusive() -> None:
    base = [0.7] * 10
    candidate = _scores(np.add(base, P_5X2)[:9], FIVE_BY_TWO[:9])
    v = _judge(ACCURACY, candidate, _scores(base, FIVE_BY_TWO), plan=PLAN_5X2)
    assert _rule(v, "baseline")["outcome"] == "inconclusive"
    assert "5x2cv needs all 10 cells" in _rule(v, "baseline")["sentence"]


def test_unknown_test_name_raises() -> None:
    with pytest.raises(ValueError, match="got 'anova'"):
        judge(ACCURACY, {}, {}, None, None, replace(PLAN, test="anova"), policy_version=0)
