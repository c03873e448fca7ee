"""Wrap a submission's pipeline in the nested search its configuration asks for.

Each outer fold job fits the search on its training rows only, so the outer score estimates the
whole tuning procedure rather than the best of many tries (Varma & Simon 2006, BMC Bioinformatics
7:91; Cawley & Talbot 2010, JMLR 11:2079-2107). The search scores candidates with the submission's
first metric, through the same metric code as the fold scores; the inner folds are
KFold(inner_folds, shuffle=True) for regression and StratifiedKFold for classification, seeded
with the fold plan's seed so a retried job makes the same choices.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy import stats
from sklearn.base import BaseEstimator
from sklearn.model_selection import GridSearchCV, KFold, RandomizedSearchCV, StratifiedKFold
from sklearn.pipeline import Pipeline

from service.catalog.metrics import spec_of
from service.submission.resolved import ResolvedConfig
from worker.learning.pipeline import MODEL_STEP, from_json
from worker.learning.scoring import score_model

PREFIX = f"{MODEL_STEP}__"


class MetricScorer:
    """Score a fitted model with one service metric, oriented so that greater is better.

    scikit-learn's searches maximise; an error metric (rmse, log_loss, ...) is negated, as its
    ``neg_*`` scorers do. An undefined value is NaN, which the search ranks last. ``classes`` is the
    dataset's class set: an inner fold's model scores against it like the outer folds do.
    """

    def __init__(self, metric: str, classes: np.ndarray | None = None) -> None:
        self.metric = metric
        self.sign = 1.0 if spec_of(metric).greater_is_better else -1.0
        self.classes = classes

    def __call__(self, estimator: Any, X: Any, y: Any) -> float:
        scores, _ = score_model(estimator, X, y, [self.metric], self.classes)
        value = scores[self.metric]
        return math.nan if value is None else self.sign * value


def inner_cv(task: str, inner_folds: int, seed: int) -> KFold | StratifiedKFold:
    """Return the inner splitter: shuffled, stratified for classification."""
    if task == "classification":
        return StratifiedKFold(inner_folds, shuffle=True, random_state=seed)
    return KFold(inner_folds, shuffle=True, random_state=seed)


def distribution(spec: Any, cls: type[BaseEstimator], name: str) -> Any:
    """Turn a JSON distribution (a list of values, or uniform / log_uniform bounds) into scipy's form."""
    if isinstance(spec, Mapping):
        if "uniform" in spec:
            low, high = (float(v) for v in spec["uniform"])
            return stats.uniform(low, high - low)
        if "log_uniform" in spec:
            low, high = (float(v) for v in spec["log_uniform"])
            return stats.loguniform(low, high)
        raise ValueError(f"distribution for {name!r} must be a list or {{'uniform'|'log_uniform': [low, high]}}, "
                         f"got {dict(spec)!r}")
    return [from_json(cls, name, v) for v in spec]


def build_model(pipeline: Pipeline, config: ResolvedConfig, classes: np.ndarray | None = None) -> BaseEstimator:
    """Return the pipeline itself, or a search over its estimator's parameters when the config has one.

    ``classes``: the dataset's class set (classification), which the search's scorer uses.
    """
    search = config.search
    if search is None:
        return pipeline
    cls = type(pipeline.named_steps[MODEL_STEP])
    seed = config.validation.seed
    cv = inner_cv(config.task, search.inner_folds, seed)
    scoring = MetricScorer(config.metrics[0], classes)
    if search.grid is not None:
        grid = {PREFIX + k: [from_json(cls, k, v) for v in values] for k, values in search.grid.items()}
        return GridSearchCV(pipeline, grid, scoring=scoring, cv=cv, refit=True, error_score="raise")
    if search.distributions is None or search.n_iter is None:
        raise ValueError("a search takes a grid, or distributions with n_iter")
    space = {PREFIX + k: distribution(v, cls, k) for k, v in search.distributions.items()}
    return RandomizedSearchCV(pipeline, space, n_iter=search.n_iter, scoring=scoring, cv=cv,
                              refit=True, random_state=seed, error_score="raise")


def search_record(model: BaseEstimator, config: ResolvedConfig) -> dict[str, Any] | None:
    """Describe a fitted search: chosen parameters (unprefixed), best inner score in the metric's units."""
    if not isinstance(model, GridSearchCV | RandomizedSearchCV):
        return None
    metric = config.metrics[0]
    sign = 1.0 if spec_of(metric).greater_is_better else -1.0
    best = float(model.best_score_)
    return {
        "best_params": {k.removeprefix(PREFIX): json_value(v) for k, v in model.best_params_.items()},
        "best_inner_score": sign * best if math.isfinite(best) else None,
        "scoring": metric,
    }


def json_value(value: Any) -> Any:
    """Return a parameter value as plain JSON (numpy scalars to Python, tuples to lists)."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, tuple):
        return [json_value(v) for v in value]
    return value
