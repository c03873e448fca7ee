"""Release mechanisms on hand-made holdout scores: exact, ladder (fixed and parameter-free), thresholdout, budget."""

from __future__ import annotations

import json
import math
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest

from service.gate.policy import Policy, ReleaseParams, ThresholdoutParams, default_policy
from service.gate.release import FAILED_NOTE, HoldoutScores, Release, budget_status, release
from service.gate.review_state import holdout_part

NOW = datetime(2026, 3, 1, 12, 0, tzinfo=UTC)
RMSE = default_policy("regression")
ACCURACY = default_policy("classification")


def _policy(base: Policy, **release_fields: Any) -> Policy:
    return replace(base, release=replace(base.release, **release_fields))


def _scores(value: float, metric: str = "rmse", *, cv: float | None = None, per_example: np.ndarray | None = None,
            sub: str = "sub_1", others: dict[str, float] | None = None) -> HoldoutScores:
    return HoldoutScores(sub, {metric: value, **(others or {})}, value if cv is None else cv, 0.5, 100, 400,
                         per_example)


def _release(policy: Policy, scores: HoldoutScores, state: dict[str, Any] | None = None, *,
             spent_at: list[datetime] | None = None, seed: int = 0, best: np.ndarray | None = None) -> Release:
    out = release(policy, scores, state=state, spent_at=spent_at or [], now=NOW, rng=np.random.default_rng(seed),
                  best_per_example=best)
    json.dumps(out.state, allow_nan=False)  # stored as JSON in holdout_releases.state
    json.dumps(out.document(), allow_nan=False)
    return out


def test_exact_rounds_every_metric_to_significant_digits() -> None:
    out = _release(_policy(RMSE, mode="exact"), _scores(12.34567, others={"mae": 0.0098765, "r2": 0.51775}))
    assert out.released == {"rmse": 12.3, "mae": 0.00988, "r2": 0.518}
    assert out.spent == 1 and out.withheld_until is None
    assert out.document() == {"released": True, "mode": "exact", "scores": out.released, "withheld_until": None,
                              "note": "Exact holdout scores, rounded to 3 significant digits.", "outcome": "released"}


def test_budget_status_in_a_rolling_window() -> None:
    times = [NOW - timedelta(hours=h) for h in (30, 20, 10, 1)]  # 30 h ago is outside a 24 h window
    assert budget_status(times, NOW, 5, 24).remaining == 2
    spent = budget_status(times, NOW, 3, 24)
    # Three in the window: the oldest (20 h ago) leaves it 4 h from now and returns one release.
    assert spent.remaining == 0 and spent.returns_at == NOW + timedelta(hours=4)
    tight = budget_status(times, NOW, 2, 24)
    assert tight.returns_at == NOW + timedelta(hours=14)  # two must leave: the second oldest at 10 h ago


def test_a_release_dated_after_now_is_spent_already() -> None:
    # A verdict held back until its publication carries that later moment; two of them stored within one pad
    # must not each find the whole budget.
    held = [NOW + timedelta(seconds=2), NOW + timedelta(seconds=3)]
    assert budget_status(held, NOW, 3, 24).remaining == 1
    spent = budget_status(held, NOW, 2, 24)
    assert spent.remaining == 0 and spent.returns_at == NOW + timedelta(hours=24, seconds=2)


def test_beyond_the_budget_the_figure_is_withheld_and_nothing_changes() -> None:
    policy = _policy(RMSE, mode="exact", budget=2, window_hours=24)
    spent = [NOW - timedelta(hours=5), NOW - timedelta(hours=2)]
    state = {"ladder": {"metric": "rmse", "step": None, "released_loss": 3.0, "best_submission": "sub_0"}}
    out = _release(policy, _scores(1.0), state, spent_at=spent)
    assert out.released is None and out.spent == 0 and out.state == state
    assert out.withheld_until == NOW + timedelta(hours=19)
    doc = out.document()
    assert doc["released"] is False and doc["scores"] is None
    assert doc["withheld_until"] == "2026-03-02T07:00:00+00:00"
    assert "this submitter's 2 holdout queries per 24 hours are spent" in (doc["note"] or "")


def test_fixed_step_ladder_moves_only_beyond_the_step() -> None:
    # Blum & Hardt 2015, Algorithm 1: move when the loss beats the released level by more than eta,
    # then release the loss rounded to a multiple of eta.
    policy = _policy(RMSE, mode="ladder", ladder_step=0.1)
    first = _release(policy, _scores(5.234, sub="a"))
    assert first.released == {"rmse": 5.2} and first.new_best
    assert first.state["ladder"]["best_submission"] == "a"
    worse = _release(policy, _scores(5.6, sub="b"), first.state)
    assert worse.released == {"rmse": 5.2} and not worse.new_best and worse.state == first.state
    close = _release(policy, _scores(5.11, sub="c"), worse.state)  # beats 5.2 by 0.09 < 0.1
    assert close.released == {"rmse": 5.2} and not close.new_best
    better = _release(policy, _scores(5.04, sub="d"), close.state)  # beats 5.2 by 0.16 > 0.1
    assert better.released == {"rmse": 5.0} and better.new_best
    assert better.state["ladder"]["best_submission"] == "d"


def test_ladder_releases_only_the_primary_metric_in_its_own_orientation() -> None:
    policy = _policy(ACCURACY, mode="ladder", ladder_step=0.01)
    first = _release(policy, _scores(0.8123, "accuracy", others={"f1": 0.77}))
    assert first.released == {"accuracy": 0.81}
    assert first.state["ladder"]["released_loss"] == pytest.approx(-0.81)  # a loss internally
    higher = _release(policy, _scores(0.8351, "accuracy"), first.state)
    assert higher.released == {"accuracy": 0.84} and higher.new_best
    lower = _release(policy, _scores(0.70, "accuracy"), higher.state)
    assert lower.released == {"accuracy": 0.84} and not lower.new_best


def _errors(rng: np.random.Generator, n: int, shift: float, noise: float) -> np.ndarray:
    return np.abs(rng.normal(1.0 + shift, 0.3, n) + rng.normal(0.0, noise, n))


def test_parameter_free_ladder_uses_the_standard_error_of_paired_differences() -> None:
    # Blum & Hardt 2015, parameter-free variant: threshold = sd(l_new - l_best) / sqrt(n).
    policy = replace(_policy(RMSE, mode="ladder"), primary_metric="mae")
    rng = np.random.default_rng(1)
    best = np.abs(rng.normal(1.0, 0.5, 400))
    first = _release(policy, HoldoutScores("a", {"mae": float(best.mean())}, 1.0, 0.1, 100, 400, best))
    assert first.new_best
    wiggle = rng.normal(0.0, 0.2, 400)
    se = float(np.std(wiggle, ddof=1)) / math.sqrt(400)  # ~0.01
    level = first.state["ladder"]["released_loss"]
    for gain_in_se, moves in ((0.5, False), (3.0, True)):
        new = best + wiggle - wiggle.mean() - (best.mean() - level) - gain_in_se * se
        out = _release(policy, HoldoutScores("b", {"mae": float(new.mean())}, 1.0, 0.1, 100, 400, new),
                       first.state, best=best)
        assert out.new_best is moves, gain_in_se
        assert "per-example differences" in (out.note or "")


def test_parameter_free_ladder_on_rmse_converts_the_squared_error_threshold() -> None:
    # sqrt(a) - sqrt(b) = (a - b) / (sqrt(a) + sqrt(b)): the mse standard error divided by rmse_new + rmse_best.
    # The threshold is the standard error itself (its multiple: test_ladder_threshold.py).
    policy = _policy(RMSE, mode="ladder", ladder_threshold_se=1.0, ladder_shrink_se=0.5)
    rng = np.random.default_rng(2)
    best_sq = rng.normal(0, 2.0, 1000) ** 2
    first = _release(policy, _scores(float(np.sqrt(best_sq.mean())), per_example=best_sq, sub="a"))
    level = first.state["ladder"]["best_loss"]  # a new best must beat the best's own rmse (its figure is rounded)
    wiggle = rng.normal(0.0, 0.5, 1000)
    for factor, moves in ((0.5, False), (2.0, True)):
        new_sq = np.clip(best_sq + wiggle - wiggle.mean(), 0, None)
        se_mse = float(np.std(new_sq - best_sq, ddof=1)) / math.sqrt(1000)
        threshold = se_mse / (2 * level)
        target = level - factor * threshold
        new_sq = new_sq * (target**2 / new_sq.mean())  # rmse exactly `target`; the spread barely changes
        se_mse = float(np.std(new_sq - best_sq, ddof=1)) / math.sqrt(1000)
        threshold = se_mse / (math.sqrt(new_sq.mean()) + math.sqrt(best_sq.mean()))
        assert (level - target > threshold) is moves
        assert level - target < se_mse  # without the conversion it would never move
        out = _release(policy, _scores(target, per_example=new_sq, sub="b"), first.state, best=best_sq)
        assert out.new_best is moves


def test_parameter_free_ladder_without_per_example_values_falls_back_to_the_fold_spread() -> None:
    # Fallback threshold: fold_std * sqrt(fold_test_rows / holdout_rows) = 0.5 * sqrt(100 / 400) = 0.25.
    policy = _policy(RMSE, mode="ladder", ladder_threshold_se=1.0, ladder_shrink_se=0.4)
    first = _release(policy, _scores(5.0, sub="a"))
    assert not _release(policy, _scores(4.8, sub="b"), first.state).new_best
    moved = _release(policy, _scores(4.7, sub="c"), first.state)
    # A new best after the first is shown shrunk by ladder_shrink_se of the same 0.25: 4.7 + 0.4 * 0.25.
    assert moved.new_best and moved.released == {"rmse": 4.8}
    assert "estimated from the folds" in (moved.note or "")


def test_ladder_restarts_when_the_primary_metric_changes() -> None:
    first = _release(_policy(RMSE, mode="ladder", ladder_step=0.1), _scores(5.0))
    mae = replace(_policy(RMSE, mode="ladder", ladder_step=0.1), primary_metric="mae")
    out = _release(mae, _scores(7.0, "mae"), first.state)
    assert out.new_best and out.released == {"mae": 7.0}


THRESHOLDOUT = _policy(RMSE, mode="thresholdout", thresholdout=ThresholdoutParams(0.5, 0.05, 2))


def test_thresholdout_answers_the_cv_mean_when_the_holdout_agrees() -> None:
    out = _release(THRESHOLDOUT, _scores(5.02, cv=5.0123))
    assert out.released == {"rmse": 5.01}
    assert out.state["thresholdout"]["spent"] == 0 and "threshold_noise" in out.state["thresholdout"]
    assert "confirms the CV estimate" in (out.note or "")


def test_thresholdout_answers_holdout_plus_laplace_noise_and_spends_its_budget() -> None:
    # Dwork et al. 2015: gamma ~ Lap(2 sigma) once, eta ~ Lap(4 sigma) per query, answer + Lap(sigma).
    out = _release(THRESHOLDOUT, _scores(6.0, cv=4.0), seed=11)
    replay = np.random.default_rng(11)
    gamma, eta, xi = replay.laplace(0, 0.1), replay.laplace(0, 0.2), replay.laplace(0, 0.05)
    assert abs(6.0 - 4.0) > 0.5 + gamma + eta
    assert out.released == {"rmse": float(f"{6.0 + xi:.3g}")}
    assert out.state["thresholdout"]["spent"] == 1
    assert out.state["thresholdout"]["threshold_noise"] == replay.laplace(0, 0.1)  # gamma is redrawn
    again = _release(THRESHOLDOUT, _scores(6.0, cv=4.0), out.state, seed=12)
    assert again.state["thresholdout"]["spent"] == 2
    spent = _release(THRESHOLDOUT, _scores(6.0, cv=4.0), again.state, seed=13)
    assert spent.released is None and spent.withheld_until is None and spent.spent == 0
    assert "budget of 2 holdout answers on this dataset is spent" in (spent.note or "")


def test_thresholdout_noise_has_the_laplace_scale() -> None:
    answers = [_release(THRESHOLDOUT, _scores(6.0, cv=4.0), seed=s).released for s in range(4000)]
    values = np.array([a["rmse"] for a in answers if a is not None]) - 6.0
    # Laplace(0, b): mean 0, mean absolute deviation b (= 0.05); rounding to 3 digits adds <= 0.005.
    assert abs(values.mean()) < 0.005
    assert np.abs(values).mean() == pytest.approx(0.05, abs=0.005)


def test_release_params_default_is_the_parameter_free_ladder() -> None:
    assert ReleaseParams().mode == "ladder" and ReleaseParams().ladder_step is None


def _row(out: Release, sub: str) -> dict[str, Any]:
    """A release as the verdict job records it (holdout_releases row), without the times."""
    return {"submission_id": sub, "mode": out.mode, "released": out.released, "state": out.state,
            "withheld_until": out.withheld_until, "policy_version": 3}


def test_the_holdout_part_says_whether_a_ladder_figure_is_this_submissions_and_nothing_when_withheld() -> None:
    policy = _policy(RMSE, ladder_step=0.5, budget=1)
    first = _release(policy, _scores(10.2, sub="sub_a"))
    # 10.3 is worse than the best (10.0 after rounding to the step): the ladder stays where sub_a put it.
    second = _release(policy, _scores(10.3, sub="sub_b"), first.state)
    a, b = holdout_part(_row(first, "sub_a")), holdout_part(_row(second, "sub_b"))
    assert a["ladder"] == {"metric": "rmse", "new_best": True, "best_so_far": 10.0, "held_by": "sub_a"}
    assert b["ladder"] == {"metric": "rmse", "new_best": False, "best_so_far": 10.0, "held_by": "sub_a"}
    assert (a["policy_version"], b["summary"]) == (3, "no new best (best so far rmse 10, held by sub_a); this "
                                                   "submission's own holdout figure is not released under the ladder")
    # Withheld by the budget: no figure, so nothing said about the ladder either.
    withheld = _release(policy, _scores(9.0, sub="sub_c"), second.state, spent_at=[NOW - timedelta(hours=1)])
    c = holdout_part(_row(withheld, "sub_c"))
    assert c["released"] is False and c["ladder"] is None and c["summary"] == c["note"]
    assert c["summary"].startswith("withheld:") and "10" not in c["summary"]
    exact = holdout_part(_row(_release(_policy(RMSE, mode="exact"), _scores(12.34567, sub="sub_d")), "sub_d"))
    assert exact["ladder"] is None and exact["summary"] == "this submission's holdout score: rmse 12.3 (exact, rounded)"


def _failed(sub: str = "sub_f") -> HoldoutScores:
    return HoldoutScores(sub, {}, 50.0, 0.5, 100, 400, None, failed=True)


@pytest.mark.parametrize("mode", ["exact", "ladder", "thresholdout"])
def test_a_failed_attempt_is_one_query_in_fixed_words_in_every_mode(mode: str) -> None:
    policy = _policy(default_policy("classification"), mode=mode)
    state = {"ladder": {"metric": "accuracy", "step": None, "released_loss": -0.9, "best_submission": "sub_0"},
             "thresholdout": {"spent": 3, "threshold_noise": 0.001}}
    out = _release(policy, _failed(), state)
    assert (out.outcome, out.released, out.spent, out.note) == ("failed", None, 1, FAILED_NOTE)
    assert out.state["ladder"] == state["ladder"]  # the ladder does not move
    # Thresholdout counts it among its answers too (its noise is not redrawn: no figure was answered).
    assert out.state["thresholdout"] == ({"spent": 4, "threshold_noise": 0.001} if mode == "thresholdout"
                                         else state["thresholdout"])


def test_beyond_either_budget_a_failure_is_withheld_as_a_figure_is() -> None:
    policy = _policy(RMSE, mode="exact", budget=2, window_hours=24, team_budget=3)
    mine = [NOW - timedelta(hours=1)]
    team = [NOW - timedelta(hours=3), NOW - timedelta(hours=2), NOW - timedelta(hours=1)]
    for scores in (_failed(), _scores(1.0)):
        out = release(policy, scores, state={}, spent_at=mine, team_spent_at=team, now=NOW,
                      rng=np.random.default_rng(0))
        assert (out.outcome, out.released, out.spent) == ("withheld", None, 0)
        assert "the team's 3 holdout queries per 24 hours are spent" in (out.note or "")
        assert out.withheld_until == NOW + timedelta(hours=21)
    spent_b = replace(policy.release.thresholdout or ThresholdoutParams(0.1, 0.01, 2), budget=2)
    tpolicy = _policy(RMSE, mode="thresholdout", thresholdout=spent_b)
    out = _release(tpolicy, _failed(), {"thresholdout": {"spent": 2}})
    assert (out.outcome, out.spent) == ("withheld", 0) and "thresholdout's budget of 2" in (out.note or "")
