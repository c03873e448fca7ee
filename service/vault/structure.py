"""Warn at registration of structure the steward did not declare: a column that looks like groups, rows in time order.

Folds that ignore groups or time let a model score on rows that are near copies of its training
rows, and every figure (and the paired tests on them) is then too good. When no group column is
declared, each column with repeated values (at least ``MIN_VALUES`` values, at least 2 rows per
value on average) is tried as a group: a one-nearest-neighbour model on the standardised numeric
columns (the candidate left out) is cross-validated twice on a sample of whole groups, with rows
of one value on both sides (5 random folds) and with whole values per fold (5 group folds), each
the mean of 3 fold draws. When the first scores better by more than ``GAP`` (R² for regression,
accuracy for classification) the column is reported with both figures. One nearest neighbour is
the model most sensitive to near copies, which is the harm in question, and costs one distance
matrix per column.

When no time column is declared, the file order is checked: the lag-1 autocorrelation of the target
in the stored order (regression), or the excess share of consecutive rows of the same class
(classification), against chance (z above ``Z_ORDER``) and a size limit; and a datetime column is
named. The thresholds are common practice, not published values. Only development rows are read,
and a sample of them (``SAMPLE_ROWS``, ``MAX_CANDIDATES`` columns), so registration stays quick.
Pure numpy and pandas: it runs where registration does, in the API process, like the balance check.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

SAMPLE_ROWS = 1500
MAX_CANDIDATES = 8
MIN_VALUES = 5
GAP = 0.25  # score difference that counts as "much easier" (common practice)
ORDER_LIMIT = 0.2  # lag-1 autocorrelation, or excess same-class share, that counts (common practice)
Z_ORDER = 4.0
_FOLDS = 5
_DRAWS = 3
_SEED = 0


def undeclared_structure(
    development: pd.DataFrame, *, target: str, task: str, declared: dict[str, str | None],
) -> list[dict[str, Any]]:
    """Return the registration warnings about undeclared groups and time order (empty when none)."""
    warnings: list[dict[str, Any]] = []
    skip = {target, *(c for c in declared.values() if c)}
    if not declared.get("group_column"):
        warnings += _group_warnings(development, target, task, skip)
    if not declared.get("time_column"):
        warnings += _order_warnings(development, target, task, skip)
    return warnings


def _group_warnings(frame: pd.DataFrame, target: str, task: str, skip: set[str]) -> list[dict[str, Any]]:
    n = len(frame)
    candidates = []
    for name in frame.columns:
        if str(name) in skip:
            continue
        values = frame[name].nunique(dropna=True)
        if MIN_VALUES <= values <= n // 2:
            candidates.append((n / values, str(name)))
    candidates.sort(reverse=True)
    found = []
    for _, name in candidates[:MAX_CANDIDATES]:
        figures = group_gap(frame, name, target, task, skip)
        if figures is not None and figures["gap"] > GAP:
            found.append({"kind": "group", "column": name, **figures, "detail": (
                f"column {name!r} looks like groups: a 1-nearest-neighbour model scores {figures['score']} "
                f"{figures['random_folds']:.3f} with rows of one {name} value on both sides of the folds and "
                f"{figures['group_folds']:.3f} with whole values per fold; if rows of one value belong together "
                f"(one vehicle, one customer), declare group_column {name!r}")})
    return found


def group_gap(frame: pd.DataFrame, column: str, target: str, task: str, skip: set[str]) -> dict[str, Any] | None:
    """Score 1-NN with random folds and with folds of whole ``column`` values, on a sample of whole values."""
    rng = np.random.default_rng(_SEED)
    codes, _ = pd.factorize(frame[column])
    present = np.flatnonzero(codes >= 0)
    order = rng.permutation(int(codes.max()) + 1) if len(present) else np.zeros(0, dtype=np.int64)
    sizes = np.bincount(codes[present], minlength=len(order))
    kept_values = order[: max(int(np.searchsorted(np.cumsum(sizes[order]), SAMPLE_ROWS)), MIN_VALUES)]
    rows = present[np.isin(codes[present], kept_values)]
    features = _standardised(frame.iloc[rows], skip | {column})
    if features is None or len(np.unique(codes[rows])) < _FOLDS:
        return None
    y = frame[target].to_numpy()[rows]
    distances = _squared_distances(features)
    random_scores, group_scores = [], []
    for _ in range(_DRAWS):  # a few fold draws: one 1-NN score on a few hundred rows is noisy
        value_fold = rng.permutation(len(order)) % _FOLDS
        random_scores.append(_nn_score(distances, y, rng.permutation(len(rows)) % _FOLDS, task))
        group_scores.append(_nn_score(distances, y, value_fold[codes[rows]], task))
    random_score, group_score = float(np.mean(random_scores)), float(np.mean(group_scores))
    return {"score": "r2" if task == "regression" else "accuracy", "rows_compared": len(rows),
            "values": int(frame[column].nunique()), "random_folds": random_score, "group_folds": group_score,
            "gap": random_score - group_score}


def _standardised(frame: pd.DataFrame, skip: set[str]) -> np.ndarray | None:
    parts = []
    for name in frame.columns:
        if str(name) in skip:
            continue
        series = frame[name]
        if pd.api.types.is_bool_dtype(series.dtype) or pd.api.types.is_numeric_dtype(series.dtype):
            values = series.to_numpy(dtype=np.float64, na_value=np.nan)
            values = np.where(np.isfinite(values), values, np.nan)
            sd = float(np.nanstd(values)) if np.isfinite(values).any() else 0.0
            if sd > 0:
                parts.append(np.nan_to_num((values - np.nanmean(values)) / sd))
    return np.column_stack(parts) if parts else None


def _squared_distances(x: np.ndarray) -> np.ndarray:
    norms = (x * x).sum(axis=1)
    return np.maximum(norms[:, None] + norms[None, :] - 2.0 * (x @ x.T), 0.0)


def _nn_score(distances: np.ndarray, y: np.ndarray, fold: np.ndarray, task: str) -> float:
    """Out-of-fold 1-NN: each row predicted by its nearest row of another fold."""
    masked = np.where(fold[:, None] == fold[None, :], np.inf, distances)
    nearest = masked.argmin(axis=1)
    if task == "regression":
        yf = y.astype(np.float64)
        variance = float(yf.var())
        return 0.0 if variance == 0 else 1.0 - float(((yf - yf[nearest]) ** 2).mean()) / variance
    return float((y == y[nearest]).mean())


def _order_warnings(frame: pd.DataFrame, target: str, task: str, skip: set[str]) -> list[dict[str, Any]]:
    found: list[dict[str, Any]] = []
    n = len(frame)
    y = frame[target].to_numpy()
    if n >= 20:
        if task == "regression":
            yf = y.astype(np.float64)
            statistic = float(np.corrcoef(yf[:-1], yf[1:])[0, 1]) if yf.std() > 0 else 0.0
            z = statistic * math.sqrt(n)
            name = "lag1_autocorrelation"
        else:
            same = float((y[:-1] == y[1:]).mean())
            shares = pd.Series(y).value_counts(normalize=True).to_numpy()
            expected = float((shares ** 2).sum())
            statistic = same - expected
            z = statistic / math.sqrt(max(expected * (1 - expected), 1e-12) / (n - 1))
            name = "same_class_excess"
        if statistic > ORDER_LIMIT and z > Z_ORDER:
            found.append({"kind": "order", "statistic": name, "value": statistic, "z": z, "detail": (
                f"the rows look ordered: the target's {name.replace('_', ' ')} in file order is {statistic:.3f} "
                f"(z = {z:.1f} against a random order); if the rows are in time order, declare a time_column, "
                "and in any case do not use contiguous folds")})
    for name in frame.columns:
        if str(name) not in skip and pd.api.types.is_datetime64_any_dtype(frame[name].dtype):
            found.append({"kind": "time_column", "column": str(name), "detail": (
                f"column {str(name)!r} holds times but no time_column was declared; if later rows must be "
                "predicted from earlier ones, declare it")})
    return found
