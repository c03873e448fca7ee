"""Reliability of predicted probabilities: per-fold bin counts and sums, pooled into a curve and its ECE.

A fold stores, for each of ``BINS`` equal-width bins of [0, 1], how many of its test rows fell in
the bin, the sum of their predicted probabilities and the sum of their outcomes (1 when the event
happened): enough to pool the out-of-fold predictions of every fold exactly, without keeping a
value per row. The bins are those of ``sklearn.calibration.calibration_curve(strategy="uniform")``:
edges ``linspace(0, 1, BINS + 1)``, a row in bin ``searchsorted(edges[1:-1], p)`` (a probability on
an inner edge belongs to the bin below it), so the pooled curve is what ``calibration_curve`` gives
on the concatenated out-of-fold predictions.

What is binned: two classes, the probability of the positive class (``classes[1]``, the larger label)
against whether the row is of that class; more classes, the top-label confidence (the largest
probability) against whether its class is the row's (Guo, Pleiss, Sun, Weinberger 2017, "On
Calibration of Modern Neural Networks", ICML, PMLR 70:1321-1330, who define the expected
calibration error on it). ECE = sum over bins of (rows in bin / rows) * |observed - predicted|
(Naeini, Cooper, Hauskrecht 2015, "Obtaining Well Calibrated Probabilities Using Bayesian
Binning", AAAI), on the same bins. Only development rows of fold test sets are ever binned.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

BINS = 10
BINNING = (f"{BINS} equal-width bins of [0, 1] (edges 0, 0.1, ..., 1; a probability on an inner edge counts in "
           "the bin below), as sklearn.calibration.calibration_curve(n_bins=10, strategy='uniform')")


def fold_bins(y: np.ndarray, proba: np.ndarray, classes: np.ndarray) -> dict[str, Any] | None:
    """Return one fold's bin counts and sums; ``proba`` has one column per class of ``classes``.

    None when a probability is not a finite number in [0, 1] (a model's numerical failure): such a
    fold has no place on a reliability curve, and its metrics say what went wrong.
    """
    p = np.asarray(proba, dtype=np.float64)
    y = np.asarray(y)
    if p.size == 0 or not (np.isfinite(p).all() and p.min() >= 0.0 and p.max() <= 1.0):
        return None
    if len(classes) == 2:
        score, outcome = p[:, 1], (y == classes[1]).astype(np.float64)
        target: dict[str, str | None] = {"kind": "positive_class", "positive_class": str(classes[1])}
    else:
        top = p.argmax(axis=1)
        score, outcome = p[np.arange(len(y)), top], (np.asarray(classes)[top] == y).astype(np.float64)
        target = {"kind": "top_label", "positive_class": None}
    edges = np.linspace(0.0, 1.0, BINS + 1)
    ids = np.searchsorted(edges[1:-1], score)
    return {
        **target, "bins": BINS,
        "count": np.bincount(ids, minlength=BINS).astype(int).tolist(),
        "sum_predicted": np.bincount(ids, weights=score, minlength=BINS).tolist(),
        "sum_observed": np.bincount(ids, weights=outcome, minlength=BINS).tolist(),
    }


def pooled(per_fold: Sequence[Mapping[str, Any]]) -> dict[str, Any] | None:
    """Pool fold bins into the reliability curve, its expected calibration error and each fold's points."""
    folds = [f for f in per_fold if f.get("calibration")]
    if not folds:
        return None
    first = folds[0]["calibration"]
    count = np.zeros(BINS)
    predicted = np.zeros(BINS)
    observed = np.zeros(BINS)
    fold_points = []
    for row in folds:
        bins = row["calibration"]
        c, s_p, s_o = (np.asarray(bins[k], dtype=np.float64) for k in ("count", "sum_predicted", "sum_observed"))
        count, predicted, observed = count + c, predicted + s_p, observed + s_o
        fold_points.append({"repeat": row["repeat"], "fold": row["fold"], "points": _points(c, s_p, s_o),
                            "ece": _ece(c, s_p, s_o)})
    edges = np.linspace(0.0, 1.0, BINS + 1)
    return {
        "kind": first["kind"], "positive_class": first.get("positive_class"), "binning": BINNING,
        "rows": int(count.sum()),
        "curve": [{"low": float(edges[b]), "high": float(edges[b + 1]), "count": int(count[b]),
                   "mean_predicted": float(predicted[b] / count[b]) if count[b] else None,
                   "fraction_observed": float(observed[b] / count[b]) if count[b] else None}
                  for b in range(BINS)],
        "ece": _ece(count, predicted, observed),
        "folds": fold_points,
    }


def _points(count: np.ndarray, predicted: np.ndarray, observed: np.ndarray) -> list[list[float]]:
    used = count > 0
    return [[float(p), float(o), int(n)] for p, o, n in
            zip(predicted[used] / count[used], observed[used] / count[used], count[used], strict=True)]


def _ece(count: np.ndarray, predicted: np.ndarray, observed: np.ndarray) -> float | None:
    total = count.sum()
    return float(np.abs(observed - predicted).sum() / total) if total else None
