"""The champion decision on the sealed rows: the non-inferiority tests against scipy, LORD++ against its recursion."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats as sps

from service.errors import InputError
from service.gate import holdout_champion as hc
from service.gate import noninferiority as ni
from service.gate.online import Stream, gamma, lord_plus_plus_level, next_level
from service.gate.policy import default_policy, parse_policy
from service.gate.verdict import ChampionFolds, PlanFacts, judge

ROWS = 300


def _losses(seed: int, shift: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    champion = rng.gamma(2.0, 1.0, ROWS)
    return champion + shift + rng.normal(0.0, 0.5, ROWS), champion


@pytest.mark.parametrize("margin", [0.0, 0.1, 0.3])
def test_mean_metric_test_is_scipys_paired_t_with_the_margin(margin: float) -> None:
    candidate, champion = _losses(1, shift=0.05)
    got = ni.mean_rows(candidate, champion, margin, greater_is_better=False)
    # H0: mean(champion - candidate) <= -margin, i.e. scipy's paired t of (champion + margin) vs candidate.
    ref = sps.ttest_rel(champion + margin, candidate, alternative="greater")
    assert got.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert got.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    one = sps.ttest_1samp(champion - candidate, -margin, alternative="greater")
    assert got.p_value == pytest.approx(one.pvalue, rel=1e-10)
    assert got.estimate == pytest.approx(float(np.mean(champion - candidate)))


def test_gain_metrics_are_oriented_the_other_way() -> None:
    rng = np.random.default_rng(2)
    champion = (rng.random(ROWS) < 0.80).astype(float)  # per-row correctness: accuracy is their mean
    candidate = np.where(rng.random(ROWS) < 0.1, 1.0 - champion, champion)
    got = ni.mean_rows(candidate, champion, 0.02, greater_is_better=True)
    ref = sps.ttest_1samp(candidate - champion, -0.02, alternative="greater")
    assert (got.statistic, got.p_value) == pytest.approx((ref.statistic, ref.pvalue), rel=1e-10)


def test_rmse_delta_method_matches_its_formula_and_a_bootstrap() -> None:
    rng = np.random.default_rng(3)
    champ_sq = (rng.normal(0.0, 1.0, ROWS)) ** 2
    cand_sq = (rng.normal(0.0, 1.05, ROWS)) ** 2
    got = ni.rmse_rows(cand_sq, champ_sq, 0.05)
    rc, rh = math.sqrt(cand_sq.mean()), math.sqrt(champ_sq.mean())
    assert got.estimate == pytest.approx(rh - rc)
    # Delta method: t = (D + margin) / (sd(u) / sqrt(n)) with u the per-row influence values, i.e. scipy's
    # ttest_1samp of u shifted so that its mean is D (it differs from D only at second order).
    u = champ_sq / (2 * rh) - cand_sq / (2 * rc)
    ref = sps.ttest_1samp(u - u.mean() + (rh - rc), -0.05, alternative="greater")
    assert got.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    # The delta-method standard error agrees with a paired bootstrap of the rmse difference (10 %).
    draws = []
    for _ in range(2000):
        i = rng.integers(0, ROWS, ROWS)
        draws.append(math.sqrt(champ_sq[i].mean()) - math.sqrt(cand_sq[i].mean()))
    assert got.standard_error == pytest.approx(float(np.std(draws, ddof=1)), rel=0.1)


def _auc(y: np.ndarray, s: np.ndarray) -> float:
    """roc_auc as the Mann-Whitney U over n_pos * n_neg (scipy.stats.mannwhitneyu)."""
    pos, neg = s[y == 1], s[y == 0]
    if pos.size == 0 or neg.size == 0:
        return math.nan
    return float(sps.mannwhitneyu(pos, neg).statistic) / (pos.size * neg.size)


def test_paired_bootstrap_on_roc_auc_is_seeded_and_sized_by_its_spread() -> None:
    rng = np.random.default_rng(4)
    y = (rng.random(ROWS) < 0.4).astype(int)
    champ = y + rng.normal(0.0, 0.8, ROWS)
    cand = y + rng.normal(0.0, 0.8, ROWS)

    def score(rows: np.ndarray) -> tuple[float, float]:
        return _auc(y[rows], cand[rows]), _auc(y[rows], champ[rows])

    a = ni.paired_bootstrap(score, ROWS, 0.02, True, np.random.default_rng(7), 400)
    b = ni.paired_bootstrap(score, ROWS, 0.02, True, np.random.default_rng(7), 400)
    assert a == b  # seeded: a retried job decides the same
    assert a.estimate == pytest.approx(_auc(y, cand) - _auc(y, champ))
    assert a.standard_error is not None and a.p_value is not None
    assert a.p_value == pytest.approx(float(sps.norm.sf((a.estimate + 0.02) / a.standard_error)))
    # Identical models: every resample differs by zero, so a positive margin decides with certainty.
    same = ni.paired_bootstrap(lambda r: (_auc(y[r], champ[r]),) * 2, ROWS, 0.02, True,
                               np.random.default_rng(7), 50)
    assert same.p_value == 0.0 and same.rejects(1e-9)


def test_identical_predictions_pass_with_a_margin_and_fail_without() -> None:
    _, champion = _losses(5)
    assert ni.mean_rows(champion, champion, 0.01, False).rejects(1e-12)
    assert not ni.mean_rows(champion, champion, 0.0, False).rejects(0.5)


def test_lord_plus_plus_levels_follow_the_published_recursion_on_a_worked_sequence() -> None:
    # gamma_j = 0.0722 log(max(j, 2)) / (j exp(sqrt(log j))) (Javanmard & Montanari 2018, from memory):
    assert gamma(1) == pytest.approx(0.0722 * math.log(2))  # 0.050045
    assert gamma(3) == pytest.approx(0.0722 * math.log(3) / (3 * math.exp(math.sqrt(math.log(3)))))
    # Its partial sums stay below one (the constant makes the infinite sum about one).
    assert sum(gamma(j) for j in range(1, 200_000)) < 1.0
    # LORD++ (Ramdas et al. 2017): alpha_t = gamma_t W0 + (alpha - W0) gamma_{t - tau_1}
    #                                         + alpha sum_{j >= 2} gamma_{t - tau_j}; alpha 0.05, W0 0.025,
    # tests 1..6 with rejections at tests 2 and 4. Values worked by hand from the formula:
    g = gamma
    by_hand = [
        0.025 * g(1),  # 0.0012511
        0.025 * g(2),  # 0.0002721
        0.025 * g(3) + 0.025 * g(1),  # first rejection at 2: 0.0014829
        0.025 * g(4) + 0.025 * g(2),
        0.025 * g(5) + 0.025 * g(3) + 0.05 * g(1),  # second rejection at 4: 0.0028974
        0.025 * g(6) + 0.025 * g(4) + 0.05 * g(2),
    ]
    got = [lord_plus_plus_level(t, [2, 4], 0.05, 0.025) for t in range(1, 7)]
    assert got == pytest.approx(by_hand, rel=1e-12)
    assert round(got[0], 7) == 0.0012511 and round(got[2], 7) == 0.0014829 and round(got[4], 7) == 0.0028974
    # The stream object gives the same levels as it advances.
    stream, levels = Stream(), []
    for rejected in (False, True, False, True, False, False):
        levels.append(next_level(stream, "lord++", 0.05))
        stream = stream.after(rejected)
    assert levels == pytest.approx(by_hand, rel=1e-12)
    assert next_level(stream, "none", 0.05) == 0.05


def test_alpha_spending_levels_are_alpha_times_gamma_and_ignore_passes() -> None:
    # Alpha-spending: alpha_t = alpha gamma_t, whatever passed before; by the union bound the chance of any
    # false pass in the whole stream is at most alpha sum(gamma_t) <= alpha under any dependence (Bonferroni).
    stream, levels = Stream(), []
    for rejected in (False, True, False, True, False, False):
        levels.append(next_level(stream, "alpha-spending", 0.05))
        stream = stream.after(rejected)
    assert levels == pytest.approx([0.05 * gamma(t) for t in range(1, 7)], rel=1e-12)
    assert round(levels[0], 7) == 0.0025023  # 0.05 * 0.0722 * log 2 = 0.05 * 0.0500452, worked by hand
    assert sum(next_level(Stream(t, ()), "alpha-spending", 0.05) for t in range(200_000)) < 0.05
    assert parse_policy({"champion_online": "alpha-spending"}, "regression").champion_online == "alpha-spending"


def test_lord_wealth_never_goes_negative() -> None:
    # The wealth W0 - sum(alpha_j) + (alpha - W0) [first rejection] + alpha [each later one] stays >= 0:
    # the property that makes LORD++'s levels valid (Ramdas et al. 2017).
    rng = np.random.default_rng(6)
    stream, wealth = Stream(), 0.025
    for _ in range(400):
        level = next_level(stream, "lord++", 0.05)
        wealth -= level
        assert wealth >= -1e-15
        rejected = bool(rng.random() < 0.2)
        if rejected:
            wealth += 0.025 if not stream.rejections else 0.05
        stream = stream.after(rejected)


def test_policy_fields_for_the_champion_rule() -> None:
    policy = default_policy("classification")
    assert (policy.champion_rule, policy.champion_online) == ("both", "lord++")
    parsed = parse_policy({"champion_rule": "holdout", "champion_online": "none"}, "classification")
    assert (parsed.champion_rule, parsed.champion_online) == ("holdout", "none")
    with pytest.raises(InputError) as err:
        parse_policy({"champion_rule": "sealed", "champion_online": "bonferroni"}, "classification")
    pointers = {p.pointer for p in err.value.problems}
    assert pointers == {"/champion_rule", "/champion_online"}
    assert "cv, holdout, both" in str(err.value)


def _decision(policy_rule: str, passed: bool) -> dict[str, object]:
    policy = replace(default_policy("classification"), champion_rule=policy_rule)
    _, champion = _losses(8)
    rows = hc.SealedRows(champion, ROWS)
    decision = hc.decide(policy, Stream(), rows, rows, candidate_id="sub_b", champion_id="sub_a")
    assert decision.passed and decision.level == pytest.approx(0.025 * gamma(1))
    forced = replace(decision, passed=passed)
    entry = hc.rule(policy, "sub_a", forced, decides=True)
    # Only the outcome and the level leave: no estimate, statistic or p-value.
    assert not {"estimate", "t", "p_one_sided", "p_value", "standard_error"} & set(entry["figures"])
    scores = {(0, f): 0.9 + 0.01 * f for f in range(5)}
    plan = PlanFacts(("kfold", 5, 1), {(0, f): (80, 20) for f in range(5)})
    champ = ChampionFolds("sub_a", {c: v - 0.001 for c, v in scores.items()}, ("kfold", 5, 1))
    base = {c: 0.5 + 0.013 * c[1] ** 2 for c in scores}
    return judge(policy, scores, base, champ, None, plan, policy_version=1, champion_holdout=entry)


def test_the_policy_says_which_champion_rule_decides() -> None:
    for rule_name in ("holdout", "both"):
        v = _decision(rule_name, passed=False)
        held = next(r for r in v["rules"] if r["rule"] == "champion_holdout")
        assert held["outcome"] == "fail" and held["figures"]["decides"] and v["decision"] == "fail"
    v = _decision("cv", passed=False)
    held = next(r for r in v["rules"] if r["rule"] == "champion_holdout")
    assert held["outcome"] == "fail" and not held["figures"]["decides"] and v["decision"] != "fail"
    assert "Shown only" in held["sentence"]
    v = _decision("holdout", passed=True)
    cv = next(r for r in v["rules"] if r["rule"] == "champion")
    assert not cv["figures"]["decides"]
    assert v["decision"] == "pass"


def test_with_champion_rule_cv_no_holdout_comparison_is_made_or_shown_as_missing() -> None:
    policy = replace(default_policy("classification"), champion_rule="cv")
    scores = {(0, f): 0.9 + 0.01 * f for f in range(5)}
    plan = PlanFacts(("kfold", 5, 1), {(0, f): (80, 20) for f in range(5)})
    champ = ChampionFolds("sub_a", {c: v - 0.001 for c, v in scores.items()}, ("kfold", 5, 1))
    v = judge(policy, scores, {c: 0.5 for c in scores}, champ, None, plan, policy_version=1)
    held = next(r for r in v["rules"] if r["rule"] == "champion_holdout")
    assert held["outcome"] == "skipped" and "no holdout query" in held["sentence"]
