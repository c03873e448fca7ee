"""The default ladder against many random submissions on coin-flip labels, and beside an honest team.

Runs the service's own release code (service.gate.release.release, default policy for accuracy,
parameter-free ladder) for several pairs of the policy fields ``ladder_threshold_se`` (how many
standard errors of its gain a new best needs) and ``ladder_shrink_se`` (how many standard errors its
released figure is shrunk by), and prints in holdout standard errors (SE = sqrt(p (1 - p) / n) of
one holdout accuracy):

- attack: labels are coin flips (chance = 0.5); ``--submissions`` seeded random models from 4 keys
  (their predictions are coin flips too, so every per-row correctness is an independent coin), then
  one adaptive submission: the majority vote of the models that set a new best (what a submitter
  can build from the ladder's answers; Blum & Hardt 2015's boosting attack). Figures: the best
  released figure over chance, mean and 90th percentile over seeds; the vote's own holdout score
  over chance (never released unless it moves the ladder) and how often it moved the ladder.
- honest: one team submits 30 genuinely improving models (true accuracy 0.70 to 0.85, errors
  correlated as real models' are: a row's difficulty is shared). After each submission, the
  released figure minus the true accuracy of the submission that holds it (the figure's error), and
  minus the best true accuracy submitted so far (how far the figure lags behind real progress).

Truth is known because the generator is: simulation data, invented for this purpose; never a
reference. Prints figures, asserts nothing. The per-submitter budget is left open (each mechanism
measured alone). Run: ``python bench/ladder_adaptive.py`` (about a minute).
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
from scipy import stats as sps

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from service.gate.policy import Policy, default_policy
from service.gate.release import HoldoutScores, release

NOW = datetime(2026, 1, 1, tzinfo=UTC)
KEYS = 4


class Ladder:
    """The release state of one dataset, fed one submission at a time."""

    def __init__(self, policy: Policy) -> None:
        self.policy, self.state, self.kept = policy, {}, {}  # type: ignore[var-annotated]

    def submit(self, sub_id: str, correct: np.ndarray) -> tuple[float, bool]:
        h = HoldoutScores(sub_id, {"accuracy": float(correct.mean())}, cv_mean=0.5, cv_std=0.05, fold_test_rows=100,
                          holdout_rows=correct.size, per_example=correct.astype(float))
        best_id = (self.state.get("ladder") or {}).get("best_submission")
        out = release(self.policy, h, state=self.state, spent_at=[], now=NOW, rng=np.random.default_rng(0),
                      best_per_example=self.kept.get(best_id))
        self.state = out.state
        if out.new_best:
            self.kept = {sub_id: correct.astype(float)}
        assert out.released is not None
        return float(out.released["accuracy"]), out.new_best


def attack(policy: Policy, n: int, submissions: int, seed: int) -> tuple[float, float, bool]:
    """Return (best released figure, the vote's own holdout accuracy, whether the vote moved the ladder)."""
    rng = np.random.default_rng([seed, 1])
    labels = rng.integers(0, 2, n)
    ladder, best, winners = Ladder(policy), 0.0, []
    for i in range(submissions):
        pred = rng.integers(0, 2, n)  # a seeded random model, from key i % KEYS
        shown, moved = ladder.submit(f"sub-{i}-key{i % KEYS}", pred == labels)
        best = max(best, shown)
        if moved:
            winners.append(pred)
    vote = (np.mean(winners, axis=0) > 0.5).astype(int) if len(winners) >= 3 else winners[-1]
    shown, moved = ladder.submit("sub-vote", vote == labels)
    return max(best, shown), float(np.mean(vote == labels)), moved


def honest(policy: Policy, n: int, seed: int, se: float) -> tuple[list[float], list[float]]:
    """Return per submission (figure - true accuracy of its holder, figure - best true so far), in SE."""
    rng = np.random.default_rng([seed, 2])
    truths = np.linspace(0.70, 0.85, 30)
    difficulty = rng.standard_normal(n)
    ladder, holder, errors, lags = Ladder(policy), None, [], []
    for j, acc in enumerate(truths):
        # Right where difficulty + noise falls below the model's cut: P(right) = acc for every model.
        cut = sps.norm.ppf(acc) * np.sqrt(1.0 + 0.5**2)
        correct = difficulty + 0.5 * rng.standard_normal(n) < cut
        shown, moved = ladder.submit(f"h{j}", correct)
        if moved:
            holder = acc
        assert holder is not None
        errors.append((shown - holder) / se)
        lags.append((shown - truths[: j + 1].max()) / se)
    return errors, lags


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=1000, help="holdout rows")
    parser.add_argument("--submissions", type=int, default=120)
    parser.add_argument("--seeds", type=int, default=200)
    parser.add_argument("--pairs", nargs="*", default=["1:0", "2:0", "2.5:0", "3:0", "1.5:1", "2:1", "2.5:1", "2:0.5"],
                        help="THRESHOLD:SHRINK, in standard errors")
    args = parser.parse_args()
    se_chance = 0.5 / np.sqrt(args.rows)
    base = default_policy("classification", ["accuracy"])
    print(f"holdout {args.rows} rows, SE at chance {se_chance:.4f}; attack: {args.submissions} random models "
          f"from {KEYS} keys + 1 majority vote of the new-best models; {args.seeds} seeds; honest: 30 models "
          "0.70 -> 0.85")
    print(f"{'threshold:shrink':>16} {'best over chance':>17} {'p90':>6} {'vote own score':>15} {'vote moved':>11} "
          f"{'honest |error|':>15} {'honest error':>13} {'honest lag':>11} {'|lag| > 1 SE':>13}")
    for pair in args.pairs:
        threshold, shrink = (float(x) for x in pair.split(":"))
        policy = replace(base, release=replace(base.release, ladder_threshold_se=threshold, ladder_shrink_se=shrink))
        best, vote, vote_moved, errs, lags = [], [], [], [], []
        for seed in range(args.seeds):
            b, v, m = attack(policy, args.rows, args.submissions, seed)
            best.append((b - 0.5) / se_chance)
            vote.append((v - 0.5) / se_chance)
            vote_moved.append(m)
            e, g = honest(policy, args.rows, seed, np.sqrt(0.78 * 0.22 / args.rows))
            errs += e
            lags += g
        print(f"{pair:>16} {np.mean(best):>17.2f} {np.quantile(best, 0.9):>6.2f} {np.mean(vote):>15.2f} "
              f"{np.mean(vote_moved):>11.2f} "
              f"{np.mean(np.abs(errs)):>15.2f} {np.mean(errs):>13.2f} {np.mean(lags):>11.2f} "
              f"{np.mean(np.abs(lags) > 1):>13.2f}")


if __name__ == "__main__":
    main()
