"""The consistency rule's false-fail rate, measured on reseals of a scikit-learn bundled dataset.

A sound model on exchangeable rows fails the holdout-consistency rule only by chance; the rule states
that chance (its nominal false-fail rate, 0.27 % by default). Here diabetes (Efron et al. 2004,
bundled with scikit-learn) is resealed 400 times with the service's own stratified seal, Ridge is
cross-validated with scikit-learn's shuffled KFold on the development rows, refitted on all of them
and scored on the holdout, and the rule is asked each time. bench/holdout_gap_calibration.py runs the
same with more reseals and models (2,000 reseals: 3.5 % before, 0.20 % now).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from sklearn.base import clone
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import mean_squared_error
from sklearn.model_selection import KFold

from service.gate.policy import default_policy
from service.gate.verdict import PlanFacts, judge
from service.vault.sealing import holdout_mask

RESEALS, FOLDS = 400, 5


def _reseal(X: np.ndarray, y: np.ndarray, seed: int) -> tuple[np.ndarray, list[tuple[int, int]], float, int]:
    mask = holdout_mask(pd.DataFrame({"target": y}), "stratified", 0.2, seed, target="target", group_column=None,
                        time_column=None, task="regression")
    Xd, yd = X[~mask], y[~mask]
    scores, sizes = [], []
    for train, test in KFold(FOLDS, shuffle=True, random_state=seed).split(Xd):
        model = clone(Ridge(alpha=0.1)).fit(Xd[train], yd[train])
        scores.append(math.sqrt(mean_squared_error(yd[test], model.predict(Xd[test]))))
        sizes.append((len(train), len(test)))
    holdout = math.sqrt(mean_squared_error(y[mask], Ridge(alpha=0.1).fit(Xd, yd).predict(X[mask])))
    return np.array(scores), sizes, holdout, int(mask.sum())


def test_a_sound_model_fails_the_consistency_rule_about_as_often_as_the_rule_says() -> None:
    X, y = load_diabetes(return_X_y=True)
    policy = default_policy("regression")
    cells = [(0, f) for f in range(FOLDS)]
    fails = uncorrected_fails = 0
    for seed in range(RESEALS):
        scores, sizes, holdout, n_holdout = _reseal(X, y, seed)
        candidate = dict(zip(cells, scores.tolist(), strict=True))
        plan = PlanFacts(("kfold", FOLDS, seed), dict(zip(cells, sizes, strict=True)), holdout_rows=n_holdout)
        verdict = judge(policy, candidate, candidate, None, holdout, plan, policy_version=0)
        fails += next(r for r in verdict["rules"] if r["rule"] == "holdout_gap")["outcome"] == "fail"
        # The rule as it was: 3 fold spreads scaled by sqrt(n_test/n_holdout + 1/J), normal quantile.
        n_test = float(np.mean([s[1] for s in sizes]))
        spread = float(scores.std(ddof=1)) * math.sqrt(n_test / n_holdout + 1 / FOLDS)
        uncorrected_fails += abs(holdout - float(scores.mean())) > 3.0 * spread
    assert policy.holdout_gap.false_fail_rate < 0.003
    # Nominal 0.27 %: about 1 of 400; a binomial count with that mean exceeds 4 with chance 0.2 % (*computed*).
    assert fails <= 4, f"{fails} false fails in {RESEALS} reseals"
    # The uncorrected rule fails several times as often (measured: 3.5 % of 2,000 reseals in the bench).
    assert uncorrected_fails >= 3 * max(fails, 2), (uncorrected_fails, fails)
