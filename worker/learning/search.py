"""Wrap a submission's pipeline in the nested search its configuration asks for.

Each outer fold job fits the search on its training rows only, so the outer score estimates the
whole tuning procedure rather than the best of many tries (Varma & Simon 2006, BMC Bioinformatics
7:91; Cawley & Talbot 2010, JMLR 11:2079-2107). The search scores candidates with the submission's
first metric, through the same metric code as the fold scores. The inner folds follow the outer
plan's structure (``PlannedInnerFolds``): on a group plan scikit-learn's GroupKFold on the groups of
the rows searched, so no group is on both sides of an inner split either; on a time plan forward
chaining on their times with tied times kept together (the vault's time folds, TimeSeriesSplit's
cuts moved off ties); on a contiguous plan unshuffled KFold; otherwise KFold(inner_folds,
shuffle=True) for regression and StratifiedKFold for classification, seeded with the fold plan's
seed so a retried job makes the same choices. Inner folds that ignored the groups or the time
would tune on leaked rows and pick the model that exploits the leak.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats
from sklearn.base import BaseEstimator
from sklearn.model_selection import GridSearchCV, GroupKFold, KFold, RandomizedSearchCV, StratifiedKFold
from sklearn.pipeline import Pipeline

from service.catalog.metrics import spec_of
from service.submission.resolved import ResolvedConfig
from service.vault.folds import FoldPlan, SplitKeys, fold_splits, split_keys_from_frame
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
    """Return the inner splitter of a plan without structure: shuffled, stratified for classification."""
    if task == "classification":
        return StratifiedKFold(inner_folds, shuffle=True, random_state=seed)
    return KFold(inner_folds, shuffle=True, random_state=seed)


@dataclass(frozen=True, eq=False)
class PlannedInnerFolds:
    """A scikit-learn CV splitter for the inner folds of a group, time or contiguous plan.

    ``keys`` are the split keys of every development row and ``rows`` the development rows the
    search is fitted on, in the order it sees them (None: all, in order); ``for_rows`` re-aims it
    when the same search is fitted on other rows (a learning-curve point).
    """

    scheme: str
    folds: int
    keys: SplitKeys
    rows: np.ndarray | None = None

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        return self.folds

    def split(self, X: Any, y: Any = None, groups: Any = None) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield (train, test) positions into the rows the search was given."""
        rows = np.arange(len(X)) if self.rows is None else self.rows
        keyed = self.scheme in ("group", "time")
        if len(X) != len(rows) or (keyed and self.rows is None and len(X) != self.keys.n_rows):
            raise ValueError(f"the inner folds were set for {len(rows) if self.rows is not None else self.keys.n_rows} "
                             f"rows, the search got {len(X)}")
        if self.scheme == "group":
            assert self.keys.groups is not None
            yield from GroupKFold(self.folds).split(np.zeros((len(rows), 1)), groups=self.keys.groups[rows])
        elif self.scheme == "time":
            assert self.keys.time is not None
            subset = SplitKeys(n_rows=len(rows), time=self.keys.time[rows])
            for split in fold_splits(FoldPlan("time", self.folds, 0), subset):
                yield split.train, split.test
        else:
            yield from KFold(self.folds).split(np.zeros((len(rows), 1)))


INNER_PLANNED = frozenset({"group", "time", "contiguous"})


def search_keys(config: ResolvedConfig, dataset: Mapping[str, Any], key_frame: pd.DataFrame) -> SplitKeys | None:
    """Return the development rows' split keys a search's inner folds need, or None when they need none."""
    plan = config.validation.fold_plan()
    if config.search is None or plan.scheme not in ("group", "time"):
        return None
    return split_keys_from_frame(key_frame, plan, str(dataset["target"]), dataset.get("group_column"),
                                 dataset.get("time_column"))


def for_rows(model: BaseEstimator, rows: np.ndarray) -> BaseEstimator:
    """Aim a search's planned inner folds at other development rows (in place); any other model as it is."""
    cv = getattr(model, "cv", None)
    if isinstance(model, GridSearchCV | RandomizedSearchCV) and isinstance(cv, PlannedInnerFolds):
        model.set_params(cv=replace(cv, rows=rows))
    return model


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


def build_model(
    pipeline: Pipeline, config: ResolvedConfig, classes: np.ndarray | None = None,
    keys: SplitKeys | None = None, rows: np.ndarray | None = None,
) -> BaseEstimator:
    """Return the pipeline itself, or a search over its estimator's parameters when the config has one.

    ``classes``: the dataset's class set (classification), which the search's scorer uses.
    ``keys``: the development rows' split keys, and ``rows`` the rows the model will be fitted on
    (None: all): a group or time plan's inner folds need them (``PlannedInnerFolds``).
    """
    search = config.search
    if search is None:
        return pipeline
    cls = type(pipeline.named_steps[MODEL_STEP])
    seed = config.validation.seed
    scheme = config.validation.fold_plan().scheme
    cv: Any = inner_cv(config.task, search.inner_folds, seed)
    if scheme in INNER_PLANNED:
        if keys is None and scheme != "contiguous":
            raise ValueError(f"a search on a {scheme} plan needs the split keys of its rows")
        cv = PlannedInnerFolds(scheme, search.inner_folds, keys or SplitKeys(0), rows)
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
