"""The champion decision on the sealed rows by simulation: size and power under each online procedure.

A stream is one dataset: one champion, fixed sealed rows, and a sequence of candidates tested one
after another with the service's own code (service.gate.holdout_champion.decide over a
service.gate.online.Stream). Candidates are drawn afresh per submission from a generator whose
difference from the champion on the sealed rows is known:

- accuracy (a mean of per-row correctness, paired t): the champion is right on each sealed row with
  probability 0.8; a candidate disagrees with it on a random share of rows, chosen so that its expected
  accuracy on those rows is the champion's minus ``delta``.
- rmse (delta method): the champion's errors are N(0, 1); a candidate's errors are correlated with the
  champion's (0.8) and scaled so that, given the champion's errors, its expected mean squared error is
  (champion's rmse + ``delta``)^2.

Everything is conditional on the stream's sealed rows, as in the service (one seal per dataset): the
paired t treats the rows' differences as one sample, so given rows whose differences come from two
kinds of row (the champion right or wrong) it is somewhat conservative (size below alpha).

Figures (each over ``--streams`` streams of ``--submissions`` candidates):
- size: candidates worse by exactly the margin (the boundary of H0): the share of tests that pass, and
  the share of streams in which any candidate passes (what "many tries eventually pass a worse model"
  means), at a fixed level (procedure "none") and under LORD++; and the same for equal models with a
  margin of 0 (the boundary of H0 is then "as good as the champion");
- power: candidates as good as the champion (delta 0), which are non-inferior: the share that pass,
  at the first test of a stream and over the whole stream;
- a mixed stream (1 candidate in 5 as good as the champion, the rest worse by the margin): the false
  discovery proportion (passes of worse models among all passes) and the share of good ones passed.

Simulation data, invented for this purpose; never a reference. Prints figures, asserts nothing.
With ``--bootstrap-tests N``, also the size of the paired bootstrap (roc_auc, equal models, margin
0), every test on rows of its own. Run: ``python bench/champion_holdout.py`` (a few minutes).
"""

from __future__ import annotations

import argparse
import math
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
from scipy import stats as sps

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from service.gate import holdout_champion as hc
from service.gate.online import Stream
from service.gate.policy import Policy, default_policy

CHAMPION_ACCURACY, DISAGREE_WHEN_WRONG = 0.8, 0.25


def accuracy_candidate(rng: np.random.Generator, champ: np.ndarray, delta: float) -> np.ndarray:
    """Per-row correctness of a candidate whose expected accuracy on these rows is champion's minus delta."""
    wrong = 1.0 - champ.mean()
    fix = DISAGREE_WHEN_WRONG  # the candidate is right on this share of the champion's errors ...
    spoil = (wrong * fix + delta) / (1.0 - wrong)  # ... and wrong on this share of its right answers
    flip = np.where(champ == 1.0, rng.random(champ.size) < spoil, rng.random(champ.size) < fix)
    return np.where(flip, 1.0 - champ, champ)


def rmse_candidate(rng: np.random.Generator, champ_err: np.ndarray, delta: float) -> np.ndarray:
    """Squared errors of a candidate whose expected rmse is the champion's plus delta (correlated errors)."""
    rho = 0.8
    base = rho * champ_err + math.sqrt(1.0 - rho**2) * rng.standard_normal(champ_err.size)
    champ_ms = float(np.mean(champ_err**2))
    target = math.sqrt(champ_ms) + delta
    # Given the champion's errors, E[mean(base^2)] = rho^2 mean(e^2) + 1 - rho^2: scale that to target^2,
    # so the candidate is worse by exactly delta on these rows (not by delta plus a per-stream bias).
    return np.square(base) * target**2 / (rho**2 * champ_ms + 1.0 - rho**2)


def run_streams(policy: Policy, metric: str, n_rows: int, streams: int, submissions: int, good_share: float,
                delta_bad: float, seed: int) -> dict[str, float]:
    passes = np.zeros((streams, submissions), dtype=bool)
    good = np.zeros((streams, submissions), dtype=bool)
    for s in range(streams):
        rng = np.random.default_rng([seed, s])
        if metric == "accuracy":
            champ = (rng.random(n_rows) < CHAMPION_ACCURACY).astype(float)
        else:
            champ_err = rng.standard_normal(n_rows)
            champ = np.square(champ_err)
        stream = Stream()
        for i in range(submissions):
            is_good = bool(rng.random() < good_share)
            delta = 0.0 if is_good else delta_bad
            cand = (accuracy_candidate(rng, champ, delta) if metric == "accuracy"
                    else rmse_candidate(rng, champ_err, delta))
            d = hc.decide(policy, stream, hc.SealedRows(cand, n_rows), hc.SealedRows(champ, n_rows),
                          candidate_id=f"c{s}-{i}", champion_id=f"h{s}")
            stream = stream.after(d.passed)
            passes[s, i], good[s, i] = d.passed, is_good
    bad = ~good
    false_passes = (passes & bad).sum(axis=1)
    all_passes = passes.sum(axis=1)
    fdp = np.where(all_passes > 0, false_passes / np.maximum(all_passes, 1), 0.0)
    return {
        "pass_rate_bad": float(passes[bad].mean()) if bad.any() else math.nan,
        "any_bad_pass": float((false_passes > 0).mean()),
        "pass_rate_good": float(passes[good].mean()) if good.any() else math.nan,
        "first_test_pass_good": float(passes[:, 0][good[:, 0]].mean()) if good[:, 0].any() else math.nan,
        "fdr": float(fdp.mean()),
    }


def _auc(y: np.ndarray, s: np.ndarray) -> float:
    """roc_auc as the Mann-Whitney statistic: mean rank of the positives (ties get mean ranks, scipy's rankdata)."""
    pos = y == 1
    n_pos, n_neg = int(pos.sum()), int((~pos).sum())
    if n_pos == 0 or n_neg == 0:
        return math.nan
    ranks = sps.rankdata(s)
    return float((ranks[pos].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg))


def bootstrap_size(tests: int, n_rows: int, seed: int) -> float:
    """Share of paired-bootstrap roc_auc tests of equal models (margin 0) that pass at alpha 0.05.

    Unconditional: every test draws its own rows, so the two models' AUCs are equal in expectation.
    """
    policy = replace(default_policy("classification", ["roc_auc"]), champion_margin=0.0, champion_online="none")
    passed = 0
    for i in range(tests):
        rng = np.random.default_rng([seed, 3, i])
        y = (rng.random(n_rows) < 0.4).astype(int)
        shared = rng.standard_normal(n_rows)
        champ = y + 0.8 * shared + 0.6 * rng.standard_normal(n_rows)
        cand = y + 0.8 * shared + 0.6 * rng.standard_normal(n_rows)

        def score(rows: np.ndarray, cand: np.ndarray = cand, champ: np.ndarray = champ, y: np.ndarray = y
                  ) -> tuple[float, float]:
            return _auc(y[rows], cand[rows]), _auc(y[rows], champ[rows])

        d = hc.decide(policy, Stream(), hc.SealedRows(None, n_rows), hc.SealedRows(None, n_rows),
                      candidate_id=f"c{i}", champion_id="h", score_rows=score)
        passed += d.passed
    return passed / tests


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--streams", type=int, default=200)
    parser.add_argument("--submissions", type=int, default=100)
    parser.add_argument("--rows", type=int, default=2000, help="sealed rows")
    parser.add_argument("--seed", type=int, default=20261203)
    parser.add_argument("--bootstrap-tests", type=int, default=0,
                        help="also measure the paired bootstrap's size on roc_auc with this many tests (slow)")
    args = parser.parse_args()
    if args.bootstrap_tests:
        size = bootstrap_size(args.bootstrap_tests, 500, args.seed)
        print(f"roc_auc, paired bootstrap ({hc.BOOTSTRAP_RESAMPLES} resamples), equal models, margin 0, 500 rows, "
              f"alpha 0.05: {size:.3f} of {args.bootstrap_tests} tests pass")
    every = (("null: all worse by margin", 0.0), ("alt: all as good", 1.0), ("mixed: 1 in 5 good", 0.2))
    # Margin 0 and equal models: the null's boundary is "as good as the champion" itself.
    cases = [("accuracy", 0.02, 0.02, every), ("rmse", 0.05, 0.05, every),
             ("accuracy", 0.0, 0.0, (("null: equal models, margin 0", 0.0),)),
             ("rmse", 0.0, 0.0, (("null: equal models, margin 0", 0.0),))]
    print(f"{args.streams} streams x {args.submissions} candidates, {args.rows} sealed rows; alpha 0.05")
    for metric, margin, worse, scenarios in cases:
        base = replace(default_policy("classification" if metric == "accuracy" else "regression", [metric]),
                       champion_margin=margin)
        print(f"\n{metric}: margin {margin}, 'worse' candidates are worse by the margin ({worse})")
        print(f"{'procedure':<14} {'scenario':<28} {'pass|worse':>10} {'any worse passes':>17} "
              f"{'pass|good':>10} {'1st test pass|good':>19} {'FDR':>6}")
        for procedure in ("none", "lord++", "alpha-spending"):
            policy = replace(base, champion_online=procedure)
            for name, share in scenarios:
                f = run_streams(policy, metric, args.rows, args.streams, args.submissions, share, worse, args.seed)
                print(f"{procedure:<14} {name:<28} {f['pass_rate_bad']:>10.4f} {f['any_bad_pass']:>17.3f} "
                      f"{f['pass_rate_good']:>10.3f} {f['first_test_pass_good']:>19.3f} {f['fdr']:>6.3f}")


if __name__ == "__main__":
    main()
