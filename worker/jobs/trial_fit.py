"""A quick trial fit at submission: refuse a configuration that cannot fit at all, naming the step.

Parameter validation cannot see what only the data shows: missing values fed to an estimator that
refuses them, a mean imputer on a text column, a solver that does not support the penalty. Such a
configuration would be accepted and then fail on every fold. So the check fits the pipeline once on
a small sample of development rows -- never a sealed row -- with its iteration counts cut down
(``QUICK_LIMITS``: the errors sought appear at the first iteration), and refuses it with the step and
scikit-learn's words when that fit raises.

Bounded: at most ``SAMPLE_ROWS`` rows (the seeded sample, plus a few rows of each class and a few rows
with a missing value in each feature, so those are seen whatever their share), one fit of reduced
size. A fit that fails on the small sample is tried once more on ``LARGER_SAMPLE_ROWS`` rows before the
configuration is refused, so an error that only a tiny sample causes does not refuse a sound one.
Samples are kept per dataset and features for the life of the process, so a checker reads a large
dataset's rows once.
"""

from __future__ import annotations

import dataclasses
import logging
import re
import warnings
from collections import OrderedDict
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import clone
from sklearn.compose import ColumnTransformer
from sklearn.pipeline import Pipeline

from service.catalog import CatalogEntry, load_catalog
from service.errors import FieldProblem, NotFound
from service.settings import Settings
from service.submission.resolved import ResolvedModel
from worker.learning.development import DevelopmentData, column_kinds, load_development
from worker.learning.pipeline import PREPROCESS_STEP, build_pipeline, entry_for

log = logging.getLogger(__name__)

SAMPLE_ROWS = 200
LARGER_SAMPLE_ROWS = 2_000
PER_CLASS_ROWS = 3
PER_FEATURE_MISSING_ROWS = 2
QUICK_LIMITS: dict[str, int] = {"n_estimators": 3, "max_iter": 10, "max_fun": 100}
_CACHED_SAMPLES = 16
_samples: OrderedDict[tuple[Any, ...], tuple[Any, np.ndarray, Any, np.ndarray]] = OrderedDict()


def trial_fit_problems(
    settings: Settings, dataset: Mapping[str, Any], model: ResolvedModel
) -> list[FieldProblem]:
    """Fit ``model`` on a sample of development rows; return the problem of the step that failed, if any.

    A checker that cannot read the rows (its data dir is not mounted) skips the trial fit and says so in
    its log: the configuration is still checked by scikit-learn's validation, and a fold worker that
    cannot read the rows either fails the submission naming the missing data.
    """
    try:
        small_X, small_y, large_X, large_y = _samples_of(settings, dataset, model.features)
    except (NotFound, OSError) as exc:
        log.warning("trial fit skipped: the development rows of %s cannot be read here (%s)", dataset["id"], exc)
        return []
    quick = quick_model(model)
    pipeline = build_pipeline(quick, column_kinds(dataset))
    error = _fit_error(pipeline, small_X, small_y)
    if error is None:
        return []
    if len(large_y) > len(small_y):
        error = _fit_error(pipeline, large_X, large_y)
        if error is None:
            return []  # only the tiny sample made it fail
    X, y = (large_X, large_y) if len(large_y) > len(small_y) else (small_X, small_y)
    pointer, step = _failing_step(pipeline, model, X, y)
    return [FieldProblem(pointer, f"{step} cannot be fitted on this dataset's development rows (a trial fit on "
                                  f"{len(y)} of them failed): {error}")]


def quick_model(model: ResolvedModel) -> ResolvedModel:
    """Return ``model`` with its iteration counts cut to ``QUICK_LIMITS`` (errors show at the first one)."""
    entry = entry_for(load_catalog(), model.estimator, "estimator")
    return dataclasses.replace(model, params={**model.params, **_quick_params(entry, model.params)})


def _quick_params(entry: CatalogEntry, params: Mapping[str, Any]) -> dict[str, Any]:
    cut: dict[str, Any] = {}
    for name, limit in QUICK_LIMITS.items():
        if name not in entry.params:
            continue
        value = params.get(name, entry.params[name].get("default"))
        if isinstance(value, int) and not isinstance(value, bool) and value > limit:
            cut[name] = limit
    return cut


def _fit_error(pipeline: Pipeline, X: Any, y: np.ndarray) -> str | None:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # convergence warnings of a cut-down fit say nothing here
            clone(pipeline).fit(X, y)
    except MemoryError:
        raise
    except Exception as exc:
        return _short(exc)
    return None


def _failing_step(pipeline: Pipeline, model: ResolvedModel, X: Any, y: np.ndarray) -> tuple[str, str]:
    """Name the first preprocess step that fails alone on its columns, else the estimator."""
    if PREPROCESS_STEP in pipeline.named_steps:
        preprocess: ColumnTransformer = pipeline.named_steps[PREPROCESS_STEP]
        for name, transformer, columns in preprocess.transformers:
            part = X[columns] if isinstance(X, pd.DataFrame) else X[:, columns]
            parts = transformer.steps if isinstance(transformer, Pipeline) else [(name, transformer)]
            for part_name, step in parts:
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        part = clone(step).fit_transform(part, y)
                except MemoryError:
                    raise
                except Exception:
                    index = int(re.findall(r"\d+$", part_name)[0])
                    described = model.preprocess[index]
                    # the first failing step is named; later ones may fail only because of it
                    return (f"/model/preprocess/{index}",
                            f"preprocess step {index} ({described.transformer} on {', '.join(described.columns)})")
    return "/model/estimator", f"the estimator {model.estimator}"


def _samples_of(
    settings: Settings, dataset: Mapping[str, Any], features: Sequence[str]
) -> tuple[Any, np.ndarray, Any, np.ndarray]:
    key = (dataset["id"], dataset.get("development_fingerprint"), tuple(features))
    if key in _samples:
        _samples.move_to_end(key)
        return _samples[key]
    data, _keys = load_development(settings, dataset, features)
    # Registration counted each column's missing values on the development rows: a feature without any
    # needs no scan of every row (at a million rows, the scan was most of a check).
    complete = {str(c["name"]) for c in dataset.get("columns") or [] if c.get("missing") == 0}
    missing = [] if complete.issuperset(features) else _rows_missing_each_feature(data)
    small = sample_rows(data, str(dataset["task"]), SAMPLE_ROWS, missing=missing)
    large = sample_rows(data, str(dataset["task"]), LARGER_SAMPLE_ROWS, missing=missing)
    found = (data.features_of(small), data.target_of(small), data.features_of(large), data.target_of(large))
    _samples[key] = found
    while len(_samples) > _CACHED_SAMPLES:
        _samples.popitem(last=False)
    return found


def sample_rows(data: DevelopmentData, task: str, size: int, seed: int = 0,
                missing: list[np.ndarray] | None = None) -> np.ndarray:
    """Return sorted row positions: a seeded sample of ``size``, plus rows of every class and with missing values.

    Chosen by a seeded generator, never by position, so a file sorted by class or with its missing
    values at the end is sampled like any other. ``missing``: the rows missing each feature, when known
    (None: found here).
    """
    rng = np.random.default_rng(seed)
    n = data.n_rows
    chosen = [rng.choice(n, size=min(n, size), replace=False)]
    if task == "classification":
        for label in np.unique(data.y):
            rows = np.flatnonzero(data.y == label)
            chosen.append(rng.choice(rows, size=min(len(rows), PER_CLASS_ROWS), replace=False))
    for rows in _rows_missing_each_feature(data) if missing is None else missing:
        chosen.append(rng.choice(rows, size=min(len(rows), PER_FEATURE_MISSING_ROWS), replace=False))
    return np.unique(np.concatenate(chosen)).astype(np.int64)


def _rows_missing_each_feature(data: DevelopmentData) -> list[np.ndarray]:
    X = data.features_of()
    missing = X.isna().to_numpy() if isinstance(X, pd.DataFrame) else np.isnan(np.asarray(X, dtype=np.float64))
    return [np.flatnonzero(missing[:, j]) for j in range(missing.shape[1]) if missing[:, j].any()]


def _short(exc: BaseException, limit: int = 400) -> str:
    text = f"{type(exc).__name__}: {exc}"
    return text if len(text) <= limit else text[:limit] + "..."
