"""Fit and score one fold: the candidate pipeline and the task's baseline, on the same rows.

An estimator that raises is a result, not a crash: the fold is recorded as failed with the
estimator's own message, so RQ retries are left for real crashes (a killed or lost work horse).
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Any

import numpy as np
import sklearn
from sklearn.base import BaseEstimator
from sklearn.pipeline import Pipeline

from service.records import submissions
from service.submission.resolved import ResolvedConfig
from service.vault.folds import Split
from service.vocabulary import TERMINAL_STATES
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on
from worker.learning.calibration import fold_bins
from worker.learning.curve import curve_points
from worker.learning.development import DevelopmentData, column_kinds, load_development, split_for
from worker.learning.pipeline import (
    MODEL_STEP,
    baseline_estimator,
    build_pipeline,
    fit_in_place,
    input_checked,
    output_feature_names,
)
from worker.learning.scoring import (
    class_labels,
    predictions,
    rows_to_score,
    score_model,
    score_predictions,
    training_sample,
)
from worker.learning.search import build_model, search_keys, search_record


def run_fold(ctx: WorkerContext, submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
    """Score one (repeat, fold) of a submission and record it; a canceled or finished one is skipped."""
    work = submission_to_work_on(ctx, submission_id, skip=TERMINAL_STATES, echo={"repeat": repeat, "fold": fold})
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    if sub["state"] == "queued":
        submissions.mark_running(ctx.engine, submission_id)  # once: the other folds read it running
    config = ResolvedConfig.from_document(sub["config"])
    data, keys = load_development(ctx.settings, dataset, config.model.features)
    split = split_for(ctx.settings, dataset, config.validation, keys, repeat, fold)
    curve = config.validation.learning_curve
    # Learning-curve sizes count from the first split's training rows, as scikit-learn's do.
    reference = len(split_for(ctx.settings, dataset, config.validation, keys, repeat, 0).train) if curve else None
    classes = class_labels(data.y) if dataset["task"] == "classification" else None
    # A search's inner folds follow the plan's groups or times, on this fold's training rows.
    model = build_model(build_pipeline(config.model, column_kinds(dataset)), config, classes,
                        search_keys(config, dataset, keys), split.train)
    outcome = evaluate_fold(
        model, data, split, str(dataset["task"]), config.metrics,
        linear=bool(config.linear), target=str(dataset["target"]),
        curve=curve, config=config, curve_reference_rows=reference, classes=classes,
    )
    stored = submissions.record_fold(ctx.engine, submission_id, repeat, fold, **outcome)
    return {"submission_id": submission_id, "repeat": repeat, "fold": fold, "status": outcome["status"],
            "stored": stored}


def evaluate_fold(
    pipeline: BaseEstimator, data: DevelopmentData, split: Split, task: str, metrics: Sequence[str], *,
    linear: bool, target: str, curve: Sequence[float] | None = None, config: ResolvedConfig | None = None,
    curve_reference_rows: int | None = None, classes: np.ndarray | None = None,
) -> dict[str, Any]:
    """Fit on the split's train rows, score on its test rows; return the fold record's fields.

    ``pipeline`` may be a search around the pipeline (``worker.learning.search``); the training rows are
    scored too, as ``cross_validate(return_train_score=True)`` does -- above ``TRAIN_SCORE_ROWS``
    rows, a seeded sample of them (``worker.learning.scoring.training_sample``), copied before the fit, which
    then may overwrite the fold's own copy of its training rows (``fit_in_place``) -- and ``curve``
    adds learning-curve points (``worker.learning.curve``). A classification is scored against
    ``classes``, the dataset's class set (by default the development target's labels), never the
    classes the fold's training rows happen to hold; a metric undefined on the test rows scores None
    and its reason goes in ``undefined``.
    """
    if classes is None and task == "classification":
        classes = class_labels(data.y)
    X_train, X_test = data.split_features(split.train, split.test)
    y_train, y_test = data.target_of(split.train), data.target_of(split.test)
    scored = training_sample(len(split.train), split.repeat, split.fold)
    X_scored, y_scored = rows_to_score(X_train, y_train, scored)
    model = pipeline
    if scored is not None and config is not None:
        model = fit_in_place(pipeline, config.model)  # X_train is this fold's own copy, never read again
    fields: dict[str, Any] = {
        "train_rows": len(split.train), "test_rows": len(split.test),
        "baseline_scores": baseline_scores(task, y_train, y_test, metrics, classes),
        "scores": None, "coefficients": None, "fit_seconds": None, "score_seconds": None, "error": None,
        "train_scores": None, "train_scored_rows": len(y_scored), "curve": None, "search": None, "undefined": None,
        "calibration": None,
    }
    try:
        started = time.perf_counter()
        with input_checked(model, data.finite):
            model.fit(X_train, y_train)
        fields["fit_seconds"] = time.perf_counter() - started
        started = time.perf_counter()
        # A classifier with probabilities also bins them for the report's reliability curve.
        binned = task == "classification" and hasattr(model, "predict_proba")
        pred, proba, labels = predictions(model, X_test, metrics, classes, proba=binned)
        scores, undefined = score_predictions(y_test, pred, proba, labels, metrics)
        if binned:
            fields["calibration"] = fold_bins(y_test, proba, labels)
        fields["score_seconds"] = time.perf_counter() - started
        # The training rows passed scikit-learn's finite checks in fit a moment ago; checking them
        # again costs ~10 ms per fold at a million rows and cannot change a score (a non-finite
        # prediction still scores None: see worker.learning.scoring).
        with sklearn.config_context(assume_finite=True):
            fields["train_scores"], _ = score_model(model, X_scored, y_scored, metrics, classes)
        if config is not None:
            fields["search"] = search_record(model, config)
        if linear:
            fields["coefficients"] = coefficients(getattr(model, "best_estimator_", model), data.features,
                                                  target)
    except MemoryError:
        raise  # a crash of the worker, not an answer about the model
    except Exception as exc:  # the estimator's own error is the fold's result
        fields.update(status="failed", error=f"{type(exc).__name__}: {exc}")
        return fields
    fields.update(status="ok", scores=scores)
    if curve:
        fields["curve"] = curve_points(pipeline, data, split, metrics, curve, full=fields,
                                       reference_rows=curve_reference_rows, classes=classes,
                                       seed=curve_seed(config))
    if undefined:
        fields["undefined"] = undefined
        fields["error"] = "; ".join(f"{name} undefined on this fold: {why}" for name, why in undefined.items())
    return fields


def baseline_scores(
    task: str, y_train: np.ndarray, y_test: np.ndarray, metrics: Sequence[str], classes: np.ndarray | None = None
) -> dict[str, float | None]:
    """Score the task's Dummy baseline; it ignores the features, so it sees a zero column."""
    baseline = baseline_estimator(task).fit(np.zeros((len(y_train), 1)), y_train)
    scores, _ = score_model(baseline, np.zeros((len(y_test), 1)), y_test, metrics, classes)
    return scores


def curve_seed(config: ResolvedConfig | None) -> int:
    """Return the seed of the learning curve's shuffles: the fold plan's, the same for every submission."""
    return 0 if config is None else config.validation.seed


def coefficients(pipeline: Pipeline, features: Sequence[str], target: str) -> dict[str, Any]:
    """Return the fitted linear model's coefficients, one row per output, named after its inputs."""
    model = pipeline.named_steps[MODEL_STEP]
    coef = np.atleast_2d(np.asarray(model.coef_, dtype=np.float64))
    intercept = np.atleast_1d(np.asarray(model.intercept_, dtype=np.float64))
    classes = getattr(model, "classes_", None)
    if classes is None:
        outputs = [target]
    elif len(classes) == 2:
        outputs = [str(classes[1])]  # binary models have one row: the log-odds of classes_[1]
    else:
        outputs = [str(c) for c in classes]
    return {
        "names": output_feature_names(pipeline, features),
        "outputs": outputs,
        "values": [[float(v) for v in row] for row in coef],
        "intercept": [float(v) for v in intercept],
    }

