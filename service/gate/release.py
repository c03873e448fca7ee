"""Decide what a submitter sees of a holdout score: exact, ladder or thresholdout, within a budget.

Every holdout figure a submitter sees is a query against the sealed partition; answered exactly and
often, it lets an adaptive submitter fit the holdout itself. Three mechanisms:

- exact: every holdout metric, rounded to ``digits`` significant digits. No protection beyond that.
- ladder (Blum & Hardt 2015): release the best-so-far holdout score of the dataset; it moves only when
  a submission beats it by more than a threshold. Fixed step eta: threshold eta, released value
  rounded to a multiple of eta. Parameter-free: the threshold is ``ladder_threshold_se`` standard
  errors of the improvement, and a new best after the first is released as its score less
  ``ladder_shrink_se`` of those standard errors (a conservative figure: the winner of many tries is
  lucky by about that much; bench/ladder_adaptive.py measures both). The standard error is that of the per-example loss
  differences between the submission and the current best (rmse: of the squared errors, divided by
  rmse_new + rmse_best, since sqrt(a) - sqrt(b) = (a - b) / (sqrt(a) + sqrt(b))); without per-example
  values it falls back to the standard error of one holdout score estimated from the folds,
  fold_std * sqrt(fold_test_rows / holdout_rows) (larger than that of a difference: it moves less).
- thresholdout (Dwork et al. 2015): answer the CV mean unless |cv - holdout| > T + gamma + eta
  (gamma ~ Lap(2 sigma), redrawn after each holdout answer; eta ~ Lap(4 sigma) per query); then answer
  holdout + Lap(sigma) and spend one unit of the dataset's budget B. B spent: withheld for good.

Ladder and thresholdout release the primary metric only: any other exact figure would bypass them.
Internally every metric is a loss (greater-is-better ones negated); figures are released in the
metric's own orientation. On top, a budget of holdout queries per dataset per rolling window, per
submitter (a person or CI identity, whatever its keys) and per team: beyond either the figure is
withheld and the document says when budget returns.

A holdout attempt that failed (the refit, a transform or the scoring raised) is a query as well: whether
a pipeline runs on the sealed rows depends on what they hold (a category or a missing value the
development rows lack). It goes through the same budget and, under thresholdout, spends one of its
answers; when allowed it is told in one fixed sentence (``FAILED_NOTE``), whatever failed and why,
and when not it is withheld exactly as a figure would be.

Pure: state in, state out. The state is a JSON-able dict per dataset (the verdict job stores it
in holdout_releases.state); it holds the ladder's level and thresholdout's secret noise, so it must never
leave the service. The caller keeps the per-example values of the ladder's best submission
(``best_submission`` in the state) and passes them back as ``best_per_example``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from service.catalog.metrics import metric_name
from service.gate.policy import Policy, ReleaseParams

# Metrics whose value is the mean of per-example values ("mean") or the square root of such a mean.
PER_EXAMPLE_FORMS = {"mse": "mean", "mae": "mean", "accuracy": "mean", "log_loss": "mean", "brier": "mean",
                     "rmse": "sqrt_of_mean", "pinball_loss": "mean", "mape": "mean", "poisson_deviance": "mean",
                     "gamma_deviance": "mean", "tweedie_deviance": "mean"}  # by metric name: options do not matter


@dataclass(frozen=True)
class HoldoutScores:
    """One submission's raw holdout scores and the CV figures the mechanisms compare them with."""

    submission_id: str
    scores: Mapping[str, float]  # raw holdout score per metric; never shown as such unless released
    cv_mean: float  # CV mean of the primary metric: thresholdout's training estimate
    cv_std: float  # fold std of the primary metric: the ladder's fallback threshold
    fold_test_rows: float  # mean test rows per fold
    holdout_rows: int
    per_example: np.ndarray | None = None  # per holdout row; mean = primary metric (rmse: squared errors)
    failed: bool = False  # the one attempt raised: no scores; the failure itself is the answer to release


@dataclass(frozen=True)
class Budget:
    """A submitter's releases left in the rolling window, and when the next one returns if none."""

    remaining: int
    returns_at: datetime | None


# What a submitter is told of a failed holdout attempt: the same words whatever failed (refit, transform,
# scoring, or the step's process crashing, killed or past a bound once it had the sealed rows) and whatever
# the exception or bound was, which stays in the records for operators.
FAILED_NOTE = ("The holdout step did not produce a figure: the model could not be refitted on the development "
               "rows or could not score the sealed rows (an error, a crash or a resource bound). The attempt "
               "counted as one holdout query.")
RELEASED, WITHHELD, FAILED = "released", "withheld", "failed"


@dataclass(frozen=True)
class Release:
    """The outcome of one release; ``state`` replaces the dataset's mechanism state."""

    mode: str
    released: dict[str, float] | None
    spent: int  # units of the submitter's budget used (0 when withheld)
    state: dict[str, Any]
    withheld_until: datetime | None = None
    note: str | None = None
    new_best: bool = False  # ladder: keep this submission's per-example values as the new best's
    outcome: str = RELEASED  # RELEASED a figure, WITHHELD everything, or told that the attempt FAILED

    def document(self) -> dict[str, Any]:
        """Return the holdout part of the submission document (``result.holdout``)."""
        return {"released": self.released is not None, "mode": self.mode, "scores": self.released,
                "withheld_until": None if self.withheld_until is None else self.withheld_until.isoformat(),
                "note": self.note, "outcome": self.outcome}


def budget_status(spent_at: Sequence[datetime], now: datetime, budget: int, window_hours: float) -> Budget:
    """Count a submitter's releases in the window ending now; say when budget returns if none is left.

    A release dated after ``now`` is a verdict stored but not yet published (``service.gate.timing``): its
    unit is already spent, so it counts, else a burst judged within one pad would all find the budget whole.
    """
    window = timedelta(hours=window_hours)
    recent = sorted(t for t in spent_at if now - window < t)
    remaining = budget - len(recent)
    if remaining > 0:
        return Budget(remaining, None)
    return Budget(0, recent[len(recent) - budget] + window)


def release(
    policy: Policy, holdout: HoldoutScores, *, state: Mapping[str, Any] | None, spent_at: Sequence[datetime],
    now: datetime, rng: np.random.Generator, best_per_example: np.ndarray | None = None,
    team_spent_at: Sequence[datetime] = (),
) -> Release:
    """Release a submission's holdout figure (or its failure) under the policy, or withhold it; return the new state.

    ``spent_at``: when this submitter's earlier holdout queries on this dataset spent budget (any age);
    ``team_spent_at``: the same for the whole team (this submitter's included).
    """
    params = policy.release
    old = dict(state or {})
    budget = budget_status(spent_at, now, params.budget, params.window_hours)
    team = budget_status(team_spent_at, now, params.team_limit, params.window_hours)
    for left, limit, whose in ((budget, params.budget, "this submitter's"), (team, params.team_limit, "the team's")):
        if left.remaining == 0:
            at = left.returns_at.isoformat() if left.returns_at else ""
            return Release(params.mode, None, 0, old, left.returns_at,
                           f"Holdout figure withheld: {whose} {limit} holdout queries per {params.window_hours:g} "
                           f"hours are spent; the next returns at {at}.", outcome=WITHHELD)
    if holdout.failed:
        return _failed(params, old)
    if params.mode == "exact":
        scores = {m: _round(v, params.digits) for m, v in holdout.scores.items()}
        return Release("exact", scores, 1, old, None,
                       f"Exact holdout scores, rounded to {params.digits} significant digits.")
    if params.mode == "ladder":
        return _ladder(policy, params, holdout, old, best_per_example)
    if params.mode == "thresholdout":
        return _thresholdout(policy, params, holdout, old, rng)
    raise ValueError(f"release mode must be exact, ladder or thresholdout, got {params.mode!r}")


def _failed(params: ReleaseParams, old: dict[str, Any]) -> Release:
    """Tell that the attempt failed, as one query; thresholdout also spends one of its answers, or withholds."""
    if params.mode == "thresholdout" and params.thresholdout is not None:
        th = dict(old.get("thresholdout") or {"spent": 0})
        if int(th.get("spent", 0)) >= params.thresholdout.budget:
            return _thresholdout_spent(params.thresholdout.budget, old)
        th["spent"] = int(th.get("spent", 0)) + 1
        return Release(params.mode, None, 1, {**old, "thresholdout": th}, None, FAILED_NOTE, outcome=FAILED)
    return Release(params.mode, None, 1, old, None, FAILED_NOTE, outcome=FAILED)


def _thresholdout_spent(budget: int, old: dict[str, Any]) -> Release:
    return Release("thresholdout", None, 0, old, None,
                   f"Holdout figure withheld: thresholdout's budget of {budget} holdout answers on this "
                   "dataset is spent, so no further holdout figure can be released.", outcome=WITHHELD)


def _ladder(policy: Policy, params: ReleaseParams, h: HoldoutScores, old: dict[str, Any],
            best_per_example: np.ndarray | None) -> Release:
    metric, sign = policy.primary_metric, (-1.0 if policy.greater_is_better else 1.0)
    ladder = dict(old.get("ladder") or {})
    if ladder.get("metric") != metric or ladder.get("step") != params.ladder_step:
        ladder = {"metric": metric, "step": params.ladder_step, "released_loss": None, "best_submission": None}
    loss = sign * float(h.scores[metric])
    level = ladder["released_loss"]
    # What a new best must beat: the released level for the fixed step (Blum & Hardt 2015, Algorithm 1); for the
    # parameter-free ladder the best's own loss, since its figure is shrunk (states from before held only the level).
    best_loss = level if params.ladder_step is not None else ladder.get("best_loss", level)
    se, how = _ladder_threshold(params, metric, h, best_per_example, ladder["best_submission"])
    threshold, shrink = se, 0.0
    if params.ladder_step is None:  # parameter-free: multiples of the standard error (policy defaults 2 and 1)
        threshold, how = se * params.ladder_threshold_se, f"{params.ladder_threshold_se:g} x {how}"
        shrink = se * params.ladder_shrink_se if level is not None else 0.0  # the first release is exact
    moved = level is None or best_loss is None or loss < best_loss - threshold
    if moved:
        step = params.ladder_step
        if step is not None:
            level = round(loss / step) * step
        else:  # threshold > shrink (parse_policy), so a new best always improves the figure; min() to be sure
            level = _round(loss + shrink if level is None else min(level, loss + shrink), params.digits)
        ladder.update(released_loss=level, best_loss=loss, best_submission=h.submission_id)
    assert level is not None
    figure = _round(sign * level, 12)  # already at the step or at ``digits``; 12 only clears float noise
    if not moved:
        told = "did not beat it by more than the threshold, so it did not move."
    elif shrink > 0:
        told = (f"set it; the figure is its holdout {metric} less {params.ladder_shrink_se:g} standard error of its "
                "gain over the previous best, because the best of many tries is lucky by about that much.")
    else:
        told = "set it."
    note = f"Ladder: the best holdout {metric} on this dataset so far; this submission {told} Threshold: {how}."
    return Release("ladder", {metric: figure}, 1, {**old, "ladder": ladder}, None, note, new_best=moved)


def _ladder_threshold(params: ReleaseParams, metric: str, h: HoldoutScores, best: np.ndarray | None,
                      best_id: str | None) -> tuple[float, str]:
    """Return the ladder's threshold in metric units and a short description of where it came from."""
    if params.ladder_step is not None:
        return params.ladder_step, f"fixed step {params.ladder_step:g}"
    form = PER_EXAMPLE_FORMS.get(metric_name(metric))
    mine = h.per_example
    if form and mine is not None and best is not None and best_id is not None and best.shape == mine.shape:
        n = mine.size
        se = float(np.std(mine - best, ddof=1)) / math.sqrt(n) if n >= 2 else math.inf
        if form == "sqrt_of_mean":
            denominator = math.sqrt(float(mine.mean())) + math.sqrt(float(best.mean()))
            se = se / denominator if denominator > 0 else math.inf
        return se, "the standard error of the per-example differences from the best submission"
    se = h.cv_std * math.sqrt(h.fold_test_rows / h.holdout_rows)
    return se, "the standard error of one holdout score, estimated from the folds"


def _thresholdout(policy: Policy, params: ReleaseParams, h: HoldoutScores, old: dict[str, Any],
                  rng: np.random.Generator) -> Release:
    metric, t = policy.primary_metric, params.thresholdout
    if t is None:
        raise ValueError("thresholdout mode needs thresholdout parameters (parse_policy guarantees them)")
    th = dict(old.get("thresholdout") or {"spent": 0})
    spent = int(th.get("spent", 0))
    if spent >= t.budget:
        return _thresholdout_spent(t.budget, old)
    gamma = float(th["threshold_noise"]) if "threshold_noise" in th else float(rng.laplace(0.0, 2 * t.sigma))
    eta = float(rng.laplace(0.0, 4 * t.sigma))
    raw = float(h.scores[metric])
    if abs(raw - h.cv_mean) > t.threshold + gamma + eta:
        figure = raw + float(rng.laplace(0.0, t.sigma))
        spent += 1
        th.update(spent=spent, threshold_noise=float(rng.laplace(0.0, 2 * t.sigma)))
        note = (f"Thresholdout: CV and holdout disagree, so this is the holdout {metric} with Laplace noise of "
                f"scale {t.sigma:g}; {t.budget - spent} of {t.budget} such answers remain on this dataset.")
    else:
        figure = h.cv_mean
        th["threshold_noise"] = gamma
        note = f"Thresholdout: the holdout confirms the CV estimate, so this is the CV mean {metric}."
    return Release("thresholdout", {metric: _round(figure, params.digits)}, 1, {**old, "thresholdout": th},
                   None, note)


def _round(x: float, digits: int) -> float:
    """Round to ``digits`` significant digits."""
    return float(f"{x:.{digits}g}") if math.isfinite(x) else x
