"""Summarise what the folds say about over- or under-fitting, the learning curve and a nested search.

The readings are evidence, not rules. Their thresholds are common practice, not derived: a
train/validation gap counts as large above 10 % of the validation error (error metrics) or 0.05
(score metrics in [0, 1] or r2); scores count as low on both when the training score is itself
within 10 % of the baseline's error, or within 0.05 of the baseline's score.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from service.catalog.metrics import spec_of

RELATIVE_GAP, ABSOLUTE_GAP = 0.10, 0.05  # common practice, see the module docstring
VARIANCE = ("large train/validation gap: points to variance -- more regularisation, fewer features or "
            "more data may help")
BIAS = "low on both training and validation rows: points to bias -- more capacity or features may help"
NEITHER = "no strong sign of either variance or bias from these scores"
READING_NOTE = ("evidence, not a rule: thresholds are common practice (gap above 10 % of the validation error, "
                "or 0.05 for scores; training score within 10 % / 0.05 of the baseline counts as low)")


def _mean(values: Sequence[float | None]) -> float | None:
    x = [v for v in values if v is not None]
    return float(np.mean(x)) if x else None


def fit_gap(rows: Sequence[Mapping[str, Any]], metrics: Sequence[str]) -> dict[str, Any] | None:
    """Per metric: train mean, validation mean, gap (positive: training rows score better) and a reading."""
    with_train = [r for r in rows if r.get("train_scores")]
    if not with_train:
        return None
    out: dict[str, Any] = {}
    for m in metrics:
        train = _mean([r["train_scores"].get(m) for r in with_train])
        valid = _mean([(r["scores"] or {}).get(m) for r in with_train])
        base = _mean([(r.get("baseline_scores") or {}).get(m) for r in with_train])
        gap = None
        reading = None
        if train is not None and valid is not None:
            better = spec_of(m).greater_is_better
            gap = train - valid if better else valid - train
            reading = _reading(gap, train, valid, base, better)
        out[m] = {"train_mean": train, "validation_mean": valid, "gap": gap, "reading": reading}
    sampled = [r for r in with_train if (r.get("train_scored_rows") or r["train_rows"]) < r["train_rows"]]
    note = READING_NOTE
    if sampled:
        least = min(int(r["train_scored_rows"]) for r in sampled)
        note += (f"; training scores of {len(sampled)} of {len(with_train)} folds come from a seeded random "
                 f"sample of their training rows (at least {least:,} rows)")
    return {"metrics": out, "note": note}


def _reading(gap: float, train: float, valid: float, base: float | None, better: bool) -> str:
    large = gap > ABSOLUTE_GAP if better else gap > RELATIVE_GAP * abs(valid)
    if large:
        return VARIANCE
    if base is not None:
        low = train - base < ABSOLUTE_GAP if better else train > (1 - RELATIVE_GAP) * base
        if low:
            return BIAS
    return NEITHER


def curve_summary(rows: Sequence[Mapping[str, Any]], metrics: Sequence[str]) -> list[dict[str, Any]] | None:
    """Per learning-curve size: mean training rows and the train and validation means over the folds."""
    curves = [r["curve"] for r in rows if r.get("curve")]
    if not curves:
        return None
    points = []
    for k, first in enumerate(curves[0]):
        at = [c[k] for c in curves if len(c) > k]
        ok = [p for p in at if p.get("scores") is not None]
        points.append({
            "fraction": first["fraction"],
            "train_rows": float(np.mean([p["train_rows"] for p in at])),
            "folds": len(ok),
            "train_mean": {m: _mean([p["train_scores"].get(m) for p in ok]) for m in metrics},
            "validation_mean": {m: _mean([p["scores"].get(m) for p in ok]) for m in metrics},
        })
    return points


def search_summary(rows: Sequence[Mapping[str, Any]], metrics: Sequence[str]) -> dict[str, Any] | None:
    """How often each value was chosen, and the naive best-inner-score mean beside the nested estimate."""
    records = [(r["search"], r["scores"]) for r in rows if r.get("search")]
    if not records:
        return None
    metric = records[0][0]["scoring"]
    chosen: dict[str, Counter[str]] = {}
    for record, _ in records:
        for name, value in record["best_params"].items():
            chosen.setdefault(name, Counter())[repr(value)] += 1
    return {
        "scoring": metric,
        "outer_folds": len(records),
        "chosen": {name: [{"value": v, "folds": n} for v, n in counts.most_common()]
                   for name, counts in chosen.items()},
        "per_fold": [record["best_params"] for record, _ in records],
        "naive_best_inner_mean": _mean([record["best_inner_score"] for record, _ in records]),
        "nested_mean": _mean([(scores or {}).get(metric) for _, scores in records]),
        "note": "the best inner score is the maximum over candidates, so it is optimistic; the nested mean scores "
                "each outer fold's chosen model on rows the search never saw (Varma & Simon 2006; "
                "Cawley & Talbot 2010)",
    }
