"""Tell development rows from holdout rows: adversarial validation with a small logistic regression.

If a classifier, trained by cross-validation, cannot tell which rows were sealed away (AUC about
0.5), the holdout looks like the development partition. The service core must not import
scikit-learn (the API process stays light), so this module carries what the check needs in numpy:
an L2-regularised logistic regression fitted by Newton's method (iteratively reweighted least
squares) with a backtracking line search, stratified folds, and the AUC by its rank formula. The
tests hold each against scikit-learn (LogisticRegression, roc_auc_score) on the same data.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

MAX_NEWTON_STEPS = 50


@dataclass(frozen=True)
class LogisticFit:
    """An intercept and coefficients; ``converged`` False when the step budget ran out first."""

    intercept: float
    coef: np.ndarray
    iterations: int
    converged: bool

    def decision(self, X: np.ndarray) -> np.ndarray:
        """Return the log-odds of the positive class for each row of ``X``."""
        return self.intercept + X @ self.coef


@dataclass(frozen=True)
class AdversarialResult:
    """The cross-validated AUC of telling holdout rows (positive) from development rows."""

    auc: float
    pvalue: float  # one-sided, against "no better than chance"
    rows: int  # rows the classifier saw (a sample on big tables)
    holdout_rows: int
    features: int
    folds: int


def fit_logistic(
    X: np.ndarray, y: np.ndarray, C: float = 1.0, max_iter: int = MAX_NEWTON_STEPS, tol: float = 1e-10
) -> LogisticFit:
    """Minimise ½‖w‖² + C·Σ log-loss with an unpenalised intercept.

    That is the objective of scikit-learn's ``LogisticRegression(C=C)`` with its default L2 penalty
    (its lbfgs and newton solvers leave the intercept unpenalised), so both reach the same optimum.
    Newton steps stop when half the squared Newton decrement falls below ``tol`` times the objective.
    """
    n_rows, n_features = X.shape
    design = np.hstack([np.ones((n_rows, 1)), X])
    target = y.astype(np.float64)
    penalty = np.ones(n_features + 1)
    penalty[0] = 0.0

    def objective(theta: np.ndarray) -> float:
        z = design @ theta
        return float(C * np.sum(np.logaddexp(0.0, z) - target * z) + 0.5 * np.sum(penalty * theta * theta))

    theta = np.zeros(n_features + 1)
    value = objective(theta)
    for step_no in range(1, max_iter + 1):
        prob = special.expit(design @ theta)
        grad = C * (design.T @ (prob - target)) + penalty * theta
        weights = prob * (1.0 - prob)
        hessian = C * (design.T * weights) @ design + np.diag(penalty)
        hessian[np.diag_indices_from(hessian)] += 1e-12  # keeps a saturated intercept solvable
        step = np.linalg.solve(hessian, grad)
        decrement = float(grad @ step)
        if decrement / 2.0 <= tol * max(1.0, abs(value)):
            return LogisticFit(float(theta[0]), theta[1:].copy(), step_no - 1, True)
        shrink = 1.0
        while True:  # Armijo backtracking: Newton's full step can overshoot far from the optimum
            candidate = theta - shrink * step
            candidate_value = objective(candidate)
            if candidate_value <= value - 1e-4 * shrink * decrement or shrink < 1e-10:
                break
            shrink /= 2.0
        theta, value = candidate, candidate_value
    return LogisticFit(float(theta[0]), theta[1:].copy(), max_iter, False)


def rank_auc(y: np.ndarray, scores: np.ndarray) -> float:
    """Return the area under the ROC curve from ranks: (R₊ - n₊(n₊+1)/2) / (n₊·n₋).

    The Mann-Whitney U statistic of the positive scores over n₊·n₋, with midranks for ties (Hanley &
    McNeil 1982, "The meaning and use of the area under a receiver operating characteristic (ROC)
    curve", Radiology 143:29-36).
    """
    positive = y.astype(bool)
    n_pos = int(positive.sum())
    n_neg = len(positive) - n_pos
    if n_pos == 0 or n_neg == 0:
        raise ValueError(f"an AUC needs both classes, got {n_pos} positive and {n_neg} negative rows")
    ranks = stats.rankdata(scores)
    return float((ranks[positive].sum() - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))


def auc_chance_pvalue(auc: float, n_pos: int, n_neg: int) -> float:
    """Return the one-sided p-value of an AUC this high when scores carry no information.

    Normal approximation to the Mann-Whitney U null, Var(U) = n₊n₋(n₊+n₋+1)/12 (Mann & Whitney 1947,
    Annals of Mathematical Statistics 18:50-60), so Var(AUC) = (n₊+n₋+1) / (12·n₊·n₋). Out-of-fold
    scores of different fold models only approximately meet the null's assumptions.
    """
    sd = math.sqrt((n_pos + n_neg + 1) / (12.0 * n_pos * n_neg))
    return float(stats.norm.sf((auc - 0.5) / sd))


def stratified_fold_ids(y: np.ndarray, folds: int, rng: np.random.Generator) -> np.ndarray:
    """Give each row a fold 0..folds-1 so that each class is spread evenly over the folds."""
    fold_ids = np.empty(len(y), dtype=np.int64)
    for label in (False, True):
        rows = rng.permutation(np.flatnonzero(y.astype(bool) == label))
        fold_ids[rows] = np.arange(len(rows)) % folds
    return fold_ids


def out_of_fold_scores(X: np.ndarray, y: np.ndarray, fold_ids: np.ndarray, C: float = 1.0) -> np.ndarray:
    """Score every row by the model fitted on the other folds (cross_val_predict's decision_function)."""
    scores = np.empty(len(y))
    for fold in np.unique(fold_ids):
        test = fold_ids == fold
        fit = fit_logistic(X[~test], y[~test], C)
        scores[test] = fit.decision(X[test])
    return scores


def adversarial_auc(
    X: np.ndarray, is_holdout: np.ndarray, folds: int = 5, C: float = 1.0, seed: int = 0
) -> AdversarialResult | None:
    """Cross-validate a holdout-vs-development classifier on ``X``; None when a side has < 2 rows.

    The folds come from a fixed ``seed``: the measurement is a function of the rows and the mask
    alone, so one draw always gets the same figure.
    """
    y = is_holdout.astype(bool)
    n_pos = int(y.sum())
    n_neg = len(y) - n_pos
    folds = min(folds, n_pos, n_neg)
    if folds < 2:
        return None
    fold_ids = stratified_fold_ids(y, folds, np.random.default_rng(seed))
    scores = out_of_fold_scores(X, y, fold_ids, C)
    auc = rank_auc(y, scores)
    return AdversarialResult(auc, auc_chance_pvalue(auc, n_pos, n_neg), len(y), n_pos, X.shape[1], folds)
