"""Review policies: task defaults, the policy document's shape, and one field problem per bad field."""

from __future__ import annotations

import json
from typing import Any

import pytest
from scipy import stats as sps

from service.errors import InputError
from service.gate.policy import Policy, ThresholdoutParams, default_policy, parse_policy


def _problems(doc: dict[str, Any], task: str = "regression", allowed: list[str] | None = None) -> dict[str, str]:
    with pytest.raises(InputError) as exc:
        parse_policy(doc, task, allowed)
    return {p.pointer: p.detail for p in exc.value.problems}


def test_regression_default() -> None:
    p = default_policy("regression")
    assert (p.primary_metric, p.greater_is_better) == ("rmse", False)
    assert p.baseline_alpha == 0.05 and p.champion_alpha == 0.05  # common practice
    # rmse is in the target's units: no default margin, floor or thresholdout can know the scale.
    assert p.champion_margin == 0.0 and p.holdout_gap.floor == 0.0 and p.release.thresholdout is None
    assert p.release.mode == "ladder" and p.release.ladder_step is None  # parameter-free ladder


def test_classification_default_and_first_dataset_metric() -> None:
    p = default_policy("classification")
    assert (p.primary_metric, p.greater_is_better) == ("accuracy", True)
    assert p.champion_margin == 0.01 and p.holdout_gap.floor == 0.01
    assert p.release.thresholdout == ThresholdoutParams(0.04, 0.01, 100)
    assert default_policy("classification", ["roc_auc", "accuracy"]).primary_metric == "roc_auc"
    with pytest.raises(ValueError, match="task must be one of regression, classification, got 'ranking'"):
        default_policy("ranking")


def test_document_has_the_served_shape_and_round_trips() -> None:
    doc = default_policy("classification").to_document(0)
    assert set(doc) == {"version", "primary_metric", "greater_is_better", "bar", "baseline_alpha",
                        "champion_margin", "champion_alpha", "holdout_gap", "max_fold_std", "release",
                        "champion_rule", "champion_online"}
    assert set(doc["holdout_gap"]) == {"k_std", "floor", "false_fail_rate"}
    assert set(doc["release"]) == {"mode", "digits", "budget", "window_hours", "team_budget", "ladder_step",
                                   "ladder_threshold_se", "ladder_shrink_se",
                                   "thresholdout"}
    assert set(doc["release"]["thresholdout"]) == {"threshold", "sigma", "budget"}
    assert doc["version"] == 0
    json.dumps(doc, allow_nan=False)
    for task in ("regression", "classification"):
        original = default_policy(task)
        assert parse_policy(original.to_document(3), task) == original


def test_a_partial_document_takes_the_defaults() -> None:
    p = parse_policy({"champion_margin": 0.5, "release": {"mode": "exact", "digits": 4}}, "regression")
    assert p.champion_margin == 0.5 and p.release.mode == "exact" and p.release.digits == 4
    assert p.release.budget == 10 and p.primary_metric == "rmse"


def test_a_full_document_is_parsed() -> None:
    doc = {"primary_metric": "mae", "greater_is_better": False, "bar": 3.5, "baseline_alpha": 0.01,
           "champion_margin": 0.2, "champion_alpha": 0.1, "holdout_gap": {"k_std": 2.5, "floor": 0.1},
           "max_fold_std": 0.8,
           "release": {"mode": "thresholdout", "digits": 2, "budget": 5, "window_hours": 12, "ladder_step": 0.05,
                       "thresholdout": {"threshold": 0.3, "sigma": 0.05, "budget": 40}}}
    p = parse_policy(doc, "regression")
    assert p == Policy("mae", False, 3.5, 0.01, 0.2, 0.1, p.holdout_gap, 0.8, p.release)
    assert (p.holdout_gap.k_std, p.holdout_gap.floor) == (2.5, 0.1)
    assert p.release.thresholdout == ThresholdoutParams(0.3, 0.05, 40)
    assert (p.release.budget, p.release.window_hours, p.release.ladder_step) == (5, 12.0, 0.05)


def test_unknown_metric() -> None:
    problems = _problems({"primary_metric": "accuracy"})
    assert problems["/primary_metric"].startswith(
        "primary_metric: metric 'accuracy' is a classification metric and does not apply to a regression dataset; "
        "metrics for regression: rmse, mse, mae, r2, ")
    problems = _problems({"primary_metric": "accurcy"})
    assert problems["/primary_metric"].startswith("primary_metric: unknown metric 'accurcy'; metrics for regression: ")


def test_metric_choices_are_resolved_to_their_key() -> None:
    policy = parse_policy({"primary_metric": "pinball_loss(alpha=0.9)"}, "regression")
    assert policy.primary_metric == "pinball_loss(alpha=0.9)" and policy.greater_is_better is False
    assert policy.champion_margin == 0.0  # in the target's units: no default margin
    policy = parse_policy({"primary_metric": "f1"}, "classification", classes=["no", "yes"])
    assert policy.primary_metric == "f1(average=binary;pos_label=yes)" and policy.greater_is_better is True
    problems = _problems({"primary_metric": "pinball_loss"})
    assert "needs alpha to be declared" in problems["/primary_metric"]


def test_metric_outside_the_datasets_allowed_list() -> None:
    problems = _problems({"primary_metric": "brier"}, "classification", ["accuracy", "log_loss"])
    assert "must be one of accuracy, log_loss" in problems["/primary_metric"]
    assert "got 'brier'" in problems["/primary_metric"]


def test_negative_margin_has_the_wrong_sign() -> None:
    detail = _problems({"champion_margin": -0.1})["/champion_margin"]
    assert "champion_margin must be >= 0" in detail and "wrong sign" in detail and "got -0.1" in detail


@pytest.mark.parametrize("level", [0, 0.5, 0.7, -0.01])
def test_level_outside_zero_to_half(level: float) -> None:
    problems = _problems({"baseline_alpha": level, "champion_alpha": level})
    assert problems["/baseline_alpha"] == f"baseline_alpha must be a significance level in (0, 0.5), got {level!r}"
    assert "/champion_alpha" in problems


def test_every_bad_field_is_reported_once() -> None:
    problems = _problems({
        "primary_metric": "rmse", "greater_is_better": True, "bar": "high", "max_fold_std": 0,
        "holdout_gap": {"k_std": -1, "floor": -0.5}, "champion_margn": 1,
        "release": {"mode": "fuzzy", "digits": 0, "budget": "ten", "window_hours": -1, "ladder_step": 0,
                    "thresholdout": {"threshold": -1, "sigma": 0, "budget": 1.5}},
    })
    assert set(problems) == {
        "/greater_is_better", "/bar", "/max_fold_std", "/holdout_gap/k_std", "/holdout_gap/floor", "/champion_margn",
        "/release/mode", "/release/digits", "/release/budget", "/release/window_hours", "/release/ladder_step",
        "/release/thresholdout/threshold", "/release/thresholdout/sigma", "/release/thresholdout/budget"}
    assert problems["/greater_is_better"].startswith("greater_is_better is fixed by the metric: rmse is lower-")
    assert problems["/release/mode"] == "release mode must be one of exact, ladder, thresholdout, got 'fuzzy'"
    assert problems["/release/digits"] == "release.digits must be an integer between 1 and 12, got 0"
    assert problems["/release/budget"] == "release.budget must be an integer between 1 and 10000, got 'ten'"
    assert problems["/release/window_hours"] == "release.window_hours must be > 0, got -1"
    assert problems["/holdout_gap/floor"] == "holdout_gap.floor must be >= 0, got -0.5"
    assert problems["/champion_margn"].startswith("unknown policy field 'champion_margn'; accepted: ")
    assert problems["/release/thresholdout/budget"].endswith("got 1.5")


def test_booleans_and_non_finite_values_are_not_numbers() -> None:
    problems = _problems({"bar": True, "champion_margin": float("inf")})
    assert problems["/bar"] == "bar must be a finite number or null, got True"
    assert problems["/champion_margin"] == "champion_margin must be a finite number, got inf"


def test_thresholdout_for_a_metric_in_target_units_needs_its_parameters() -> None:
    problems = _problems({"release": {"mode": "thresholdout"}})
    assert problems == {"/release/thresholdout": "release mode thresholdout needs thresholdout parameters "
                        "(threshold, sigma, budget) in rmse units; got none"}
    partial = _problems({"release": {"mode": "thresholdout", "thresholdout": {"threshold": 0.5}}})
    assert set(partial) == {"/release/thresholdout/sigma", "/release/thresholdout/budget"}
    assert "required for rmse" in partial["/release/thresholdout/sigma"]


def test_non_object_sections_are_rejected() -> None:
    assert _problems({"release": 3})["/release"] == "release must be an object, got 3"
    with pytest.raises(InputError):
        parse_policy([], "regression")  # type: ignore[arg-type]


def test_version_in_the_document_is_ignored() -> None:
    assert parse_policy({"version": 7}, "regression") == default_policy("regression")


def test_the_team_budget_defaults_to_three_submitters_and_is_checked() -> None:
    default = default_policy("regression").release
    assert default.team_budget is None and default.team_limit == 3 * default.budget  # a judgement, see policy.py
    set_ = parse_policy({"release": {"budget": 4, "team_budget": 6}}, "regression").release
    assert (set_.budget, set_.team_limit) == (4, 6)
    assert parse_policy({"release": {"team_budget": None}}, "regression").release.team_budget is None
    with pytest.raises(InputError) as exc:
        parse_policy({"release": {"team_budget": 0}}, "regression")
    assert [p.pointer for p in exc.value.problems] == ["/release/team_budget"]


def test_holdout_gap_states_its_false_fail_rate_and_takes_one_instead_of_k_std() -> None:
    # Nominal false-fail rate 2 * (1 - Phi(k)): 0.27 % at the default k = 3 (*computed* with scipy).
    default = default_policy("regression")
    assert default.holdout_gap.false_fail_rate == pytest.approx(2 * sps.norm.sf(3.0), rel=1e-12)
    assert default.to_document(0)["holdout_gap"]["false_fail_rate"] == pytest.approx(0.0026998, abs=1e-7)
    p = parse_policy({"holdout_gap": {"false_fail_rate": 0.01}}, "regression")
    assert p.holdout_gap.k_std == pytest.approx(2.5758293, abs=1e-6)  # Phi^-1(0.995), *computed*
    assert p.holdout_gap.false_fail_rate == pytest.approx(0.01, rel=1e-9)
    assert parse_policy(p.to_document(2), "regression").holdout_gap.k_std == pytest.approx(p.holdout_gap.k_std)
    with pytest.raises(InputError) as raised:
        parse_policy({"holdout_gap": {"k_std": 3.0, "false_fail_rate": 0.01}}, "regression")
    assert [pr.pointer for pr in raised.value.problems] == ["/holdout_gap/false_fail_rate"]
    assert "asks for k_std 2.57583, but k_std 3 was given" in raised.value.problems[0].detail
    with pytest.raises(InputError) as raised:
        parse_policy({"holdout_gap": {"false_fail_rate": 0.7}}, "regression")
    assert raised.value.problems[0].detail == "holdout_gap.false_fail_rate must be at most 0.5, got 0.7"
