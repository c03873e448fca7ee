"""An adaptive submitter against each release mode: how far the released holdout figure climbs above the truth.

The submitter hill-climbs on what it is shown: each of 200 submissions adds 3 random features from a
pool of pure-noise columns to the best set so far, fits least squares on the development rows, and
keeps the change when the released holdout rmse improved. Truth is the rmse of the kept model on
20,000 fresh rows from the same generator. Overstatement = true rmse - released rmse (positive: the
released figure looks better than the model is). Simulation data, invented for this purpose
(delivery-route lateness in minutes: 3 real features, 100 noise features); never a reference.

Scale, *computed* from the generator: noise sd 5 minutes, so the honest model's rmse is about 5.0 and
the standard error of a 200-row holdout rmse is about 5 / sqrt(2 * 200) = 0.25.

Seeds are fixed; each seed gives every mode the same data and the same proposals (paired). Margins
are wide relative to the spread over seeds (about 0.2 per seed, 0.05 for the mean of 20).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import UTC, datetime

import numpy as np
import pytest

from service.gate.policy import ReleaseParams, ThresholdoutParams, default_policy
from service.gate.release import HoldoutScores, release

N_DEV, N_HOLDOUT, N_FRESH = 400, 200, 20_000
N_REAL, N_NOISE, ROUNDS, ADD_PER_ROUND, FOLDS = 3, 100, 200, 3, 5
NOISE_SD, BETA = 5.0, np.array([4.0, 2.0, 1.0])  # lateness = 20 + 4 traffic + 2 stops + 1 rain + noise
SEEDS = range(20)
HOLDOUT_SE = NOISE_SD / np.sqrt(2 * N_HOLDOUT)  # 0.25, *computed* (Gaussian noise: sd(rmse) ~ sd / sqrt(2n))
# The per-submitter window is left open: each mechanism is measured alone (test_release.py covers it).
OPEN = ReleaseParams(budget=10_000, window_hours=1.0)

MODES: dict[str, ReleaseParams] = {
    "exact": replace(OPEN, mode="exact"),
    "ladder, step 0.1": replace(OPEN, mode="ladder", ladder_step=0.1),
    "ladder, parameter-free": replace(OPEN, mode="ladder"),
    "ladder, parameter-free, no per-row losses": replace(OPEN, mode="ladder"),
    # T = 2 holdout standard errors, sigma = T / 10. Dwork et al.'s illustration (T = 0.04 with about
    # 10,000 holdout rows, from memory: some 8 SE) would answer the CV mean every time here.
    "thresholdout, T 0.5": replace(OPEN, mode="thresholdout", thresholdout=ThresholdoutParams(0.5, 0.05, 100)),
}


@dataclass(frozen=True)
class World:
    """One draw of development, holdout and fresh rows, with the Gram matrices that make fits cheap."""

    dev_x: np.ndarray
    dev_y: np.ndarray
    holdout_x: np.ndarray
    holdout_y: np.ndarray
    fresh_x: np.ndarray
    fresh_y: np.ndarray
    fold_of_row: np.ndarray
    gram: np.ndarray
    moment: np.ndarray
    fold_gram: np.ndarray  # (folds, p, p): Gram of each fold's training rows
    fold_moment: np.ndarray  # (folds, p)


def _draw(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    x = rng.standard_normal((n, N_REAL + N_NOISE))
    y = 20.0 + x[:, :N_REAL] @ BETA + NOISE_SD * rng.standard_normal(n)
    return np.column_stack([np.ones(n), x]), y


def _world(seed: int) -> World:
    rng = np.random.default_rng(seed)
    (dx, dy), (hx, hy), (fx, fy) = _draw(rng, N_DEV), _draw(rng, N_HOLDOUT), _draw(rng, N_FRESH)
    fold_of_row = np.repeat(np.arange(FOLDS), N_DEV // FOLDS)
    gram, moment = dx.T @ dx, dx.T @ dy
    parts = [fold_of_row == k for k in range(FOLDS)]
    fold_gram = np.stack([gram - dx[m].T @ dx[m] for m in parts])
    fold_moment = np.stack([moment - dx[m].T @ dy[m] for m in parts])
    return World(dx, dy, hx, hy, fx, fy, fold_of_row, gram, moment, fold_gram, fold_moment)


def _fit(gram: np.ndarray, moment: np.ndarray, cols: list[int]) -> np.ndarray:
    return np.linalg.solve(gram[np.ix_(cols, cols)], moment[cols])


def _cv(w: World, cols: list[int]) -> tuple[float, float]:
    """Return the mean and std of the fold rmse of least squares on ``cols`` (all folds in one solve)."""
    coefs = np.linalg.solve(w.fold_gram[:, cols][:, :, cols], w.fold_moment[:, cols][..., None])[..., 0]
    predictions = (w.dev_x[:, cols] @ coefs.T)[np.arange(N_DEV), w.fold_of_row]
    squared = (w.dev_y - predictions) ** 2
    scores = np.sqrt(np.bincount(w.fold_of_row, squared) / np.bincount(w.fold_of_row))
    return float(scores.mean()), float(scores.std(ddof=1))


def _attack(w: World, name: str, params: ReleaseParams, seed: int) -> tuple[float, float]:
    """Play the submitter; return (released rmse of the kept model, its true rmse on fresh rows)."""
    policy = replace(default_policy("regression"), release=params)
    proposals, noise = np.random.default_rng(10_000 + seed), np.random.default_rng(20_000 + seed)
    needs_cv = params.mode == "thresholdout" or "no per-row" in name
    per_row = "no per-row" not in name
    honest = list(range(N_REAL + 1))  # intercept and the three real features
    kept, kept_figure, kept_coef = honest, np.inf, np.zeros(0)
    state: dict[str, object] | None = None
    best_losses: np.ndarray | None = None
    for t in range(ROUNDS):
        pool = [j for j in range(N_REAL + 1, N_REAL + 1 + N_NOISE) if j not in kept]
        cols = kept + sorted(proposals.choice(pool, ADD_PER_ROUND, replace=False).tolist()) if t else honest
        coef = _fit(w.gram, w.moment, cols)
        losses = (w.holdout_y - w.holdout_x[:, cols] @ coef) ** 2
        cv_mean, cv_std = _cv(w, cols) if needs_cv else (np.nan, np.nan)
        scored = HoldoutScores(f"sub_{t}", {"rmse": float(np.sqrt(losses.mean()))}, cv_mean, cv_std,
                               N_DEV / FOLDS, N_HOLDOUT, losses if per_row else None)
        out = release(policy, scored, state=state, spent_at=[], now=datetime.now(UTC), rng=noise,
                      best_per_example=best_losses)
        state = out.state
        if out.new_best:
            best_losses = losses
        figure = np.inf if out.released is None else out.released["rmse"]  # withheld: nothing to climb on
        if figure < kept_figure:
            kept, kept_figure, kept_coef = cols, figure, coef
    truth = float(np.sqrt(np.mean((w.fresh_y - w.fresh_x[:, kept] @ kept_coef) ** 2)))
    return kept_figure, truth


@pytest.fixture(scope="module")
def worlds() -> list[World]:
    return [_world(seed) for seed in SEEDS]


@pytest.fixture(scope="module")
def overstatement(worlds: list[World]) -> dict[str, np.ndarray]:
    """Overstatement (true - released rmse) per mode and seed; printed as the figures for the README."""
    result: dict[str, list[float]] = {name: [] for name in MODES}
    truths: dict[str, list[float]] = {name: [] for name in MODES}
    for seed, w in zip(SEEDS, worlds, strict=True):
        for name, params in MODES.items():
            released, truth = _attack(w, name, params, seed)
            result[name].append(truth - released)
            truths[name].append(truth)
    print(f"\nadaptive submitter, {ROUNDS} submissions, {len(SEEDS)} seeds, holdout rmse SE {HOLDOUT_SE:.2f}:")
    for name, values in result.items():
        v = np.array(values)
        print(f"  {name:44s} overstatement mean {v.mean():+.3f} (sd {v.std(ddof=1):.3f}, max {v.max():+.3f}); "
              f"true rmse of the kept model {np.mean(truths[name]):.3f}")
    exact = np.array(result["exact"])
    for name, values in list(result.items())[1:]:
        d = exact - np.array(values)
        print(f"  exact minus {name:32s} mean {d.mean():+.3f} sd {d.std(ddof=1):.3f} min {d.min():+.3f}")
    return {name: np.array(values) for name, values in result.items()}


def test_exact_release_is_overfit_by_the_adaptive_submitter(overstatement: dict[str, np.ndarray]) -> None:
    # Selection over 200 exact figures: the winner's curse, more than one holdout SE (measured ~0.45).
    assert overstatement["exact"].mean() > HOLDOUT_SE


def test_ladder_with_a_step_keeps_the_figure_near_the_truth(overstatement: dict[str, np.ndarray]) -> None:
    ladder = overstatement["ladder, step 0.1"]
    assert ladder.mean() < 0.4 * HOLDOUT_SE  # measured ~0.05
    assert ladder.mean() < overstatement["exact"].mean() - HOLDOUT_SE


def test_parameter_free_ladder_cuts_the_overstatement(overstatement: dict[str, np.ndarray]) -> None:
    # With per-row losses the threshold is one SE of the paired differences: near-copies of the best
    # differ little, so it moves more often than a fixed step does (measured ~0.27 against exact ~0.47;
    # paired over seeds the cut is ~0.20 with sd ~0.08).
    cut = overstatement["exact"] - overstatement["ladder, parameter-free"]
    assert cut.mean() > 0.4 * HOLDOUT_SE
    # Without per-row losses the threshold is the SE of one holdout score: it hardly ever moves.
    assert overstatement["ladder, parameter-free, no per-row losses"].mean() < 0.4 * HOLDOUT_SE


def test_thresholdout_keeps_the_figure_within_its_threshold(overstatement: dict[str, np.ndarray]) -> None:
    # Its answers stay within about T of the holdout (Dwork et al. 2015), not closer: the CV mean it
    # mostly releases is itself overfit by the same selection (measured ~0.37 with T = 0.5). Its edge
    # over exact (~0.10, sd ~0.22 over seeds) is too small to assert; the ladder's is not.
    threshold = MODES["thresholdout, T 0.5"].thresholdout
    assert threshold is not None
    assert overstatement["thresholdout, T 0.5"].mean() < threshold.threshold
    assert overstatement["ladder, step 0.1"].mean() < overstatement["thresholdout, T 0.5"].mean() - HOLDOUT_SE


def test_an_honest_submitter_is_not_overstated(worlds: list[World]) -> None:
    """Control: a single honest submission's exact figure is unbiased (the measuring device is sound)."""
    gaps = []
    for w in worlds:
        cols = list(range(N_REAL + 1))
        coef = _fit(w.gram, w.moment, cols)
        holdout = float(np.sqrt(np.mean((w.holdout_y - w.holdout_x[:, cols] @ coef) ** 2)))
        truth = float(np.sqrt(np.mean((w.fresh_y - w.fresh_x[:, cols] @ coef) ** 2)))
        gaps.append(truth - holdout)
    assert abs(np.mean(gaps)) < 0.5 * HOLDOUT_SE  # the mean of 20 unbiased gaps: SE ~ 0.06
