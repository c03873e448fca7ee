"""Submission requests as frozen values, and their resolution against a dataset and the catalog.

The API parses a request body once into a ``SubmissionRequest``; ``resolve`` then checks it against
the dataset (columns, task, fold plan) and the catalog, and produces the ``ResolvedConfig``
(``service.submission.resolved``) whose document is stored with the submission and read by the
worker. Parameter values themselves are checked by scikit-learn in a worker
(``worker.jobs.check_config``), not here.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from service.catalog.metric_keys import MetricRefused, resolve_metric
from service.catalog.metrics import DEFAULT_METRICS
from service.errors import ConfigRejected, FieldProblem
from service.submission.model_checks import CatalogView, check_native, check_nested
from service.submission.resolved import PreprocessStep, ResolvedConfig, ResolvedModel, SearchSpec, ValidationPlan

MAX_FOLDS, MAX_REPEATS, MAX_FOLD_JOBS = 20, 10, 100
MAX_CANDIDATES, MAX_SEARCH_FITS, MAX_INNER_FOLDS = 50, 2000, 10
LEARNING_CURVE_DEFAULT = (0.1, 0.325, 0.55, 0.775, 1.0)  # scikit-learn learning_curve's default sizes
ENCODERS = frozenset({"OneHotEncoder", "OrdinalEncoder", "TargetEncoder"})


@dataclass(frozen=True)
class DatasetRef:
    """Which dataset, optionally pinned to the exact data by its fingerprint."""

    id: str
    fingerprint: str | None = None


@dataclass(frozen=True)
class ModelSpec:
    """The estimator, its parameters, the features it sees and their preprocessing."""

    estimator: str
    params: Mapping[str, Any] = field(default_factory=dict)
    features: tuple[str, ...] | None = None
    preprocess: tuple[PreprocessStep, ...] = ()
    categorical_features: tuple[str, ...] = ()  # taken as categories by the estimator itself


@dataclass(frozen=True)
class ValidationSpec:
    """Cross-validation options; ``folds=None`` means the dataset's fold plan."""

    folds: int | None = None
    repeats: int = 1
    test: str | None = None  # "5x2cv": 5 repeats of 2-fold CV, compared by Dietterich's paired t-test
    learning_curve: tuple[float, ...] | None = None  # fractions of each training fold, e.g. (0.1, ..., 1.0)


# A metric as requested: a name or key ("f1", "f1(average=weighted)"), or an object {"name": ..., options}.
MetricRequest = str | Mapping[str, Any]


@dataclass(frozen=True)
class SubmissionRequest:
    """A parsed ``POST /v1/submissions`` body."""

    dataset: DatasetRef
    model: ModelSpec
    validation: ValidationSpec = ValidationSpec()
    metrics: tuple[MetricRequest, ...] | None = None
    label: str = ""
    search: SearchSpec | None = None


class _Problems:
    """Collects field problems so one response names all of them."""

    def __init__(self) -> None:
        self.items: list[FieldProblem] = []

    def add(self, pointer: str, detail: str) -> None:
        self.items.append(FieldProblem(pointer, detail))

    def raise_if_any(self) -> None:
        if self.items:
            summary = "; ".join(p.detail for p in self.items[:3])
            raise ConfigRejected(summary, self.items)


def resolve(request: SubmissionRequest, dataset: Mapping[str, Any], catalog: CatalogView) -> ResolvedConfig:
    """Check ``request`` against ``dataset`` and the catalog; return the resolved configuration."""
    problems = _Problems()
    task = str(dataset["task"])
    kinds = {c["name"]: c["kind"] for c in dataset["columns"]}
    reserved = {dataset["target"], dataset.get("id_column")} - {None}

    model = request.model
    est_task = catalog.estimator_task(model.estimator)
    if est_task != task:
        accepted = ", ".join(catalog.estimator_names(task))
        what = "is not in the catalog" if est_task is None else f"is a {est_task} estimator"
        problems.add("/model/estimator", f"estimator {model.estimator!r} {what}; for a {task} dataset "
                     f"use one of: {accepted}")

    if est_task == task:
        check_nested(model.estimator, model.params, task, catalog, problems.add)
    features = _resolve_features(model, dataset, kinds, reserved, problems)
    steps = _resolve_steps(model, features, problems, catalog)
    native = check_native(model.estimator, model.categorical_features, features, kinds, steps, catalog,
                          problems.add)
    _check_categoricals(features, kinds, steps, native, problems)
    metrics = _resolve_metrics(request.metrics, task, dataset, problems)
    plan = _resolve_plan(request.validation, dataset["fold_plan"], problems)
    if request.validation.learning_curve is not None:
        plan = replace(plan, learning_curve=_resolve_curve(request.validation.learning_curve, problems))
    search = _resolve_search(request.search, request.model, plan, problems)
    problems.raise_if_any()
    return ResolvedConfig(
        model=ResolvedModel(estimator=model.estimator, params=dict(model.params), features=tuple(features),
                            preprocess=steps, categorical_features=native),
        validation=plan,
        metrics=tuple(metrics),
        search=search,
        label=request.label,
        task=task,
        target=str(dataset["target"]),
    )


def config_fingerprint(config: ResolvedConfig, dataset_fingerprint: str) -> str:
    """SHA-256 of the canonical JSON of what determines the result: model, validation, metrics, data."""
    document = config.to_document()
    material = {
        "model": document["model"], "validation": document["validation"],
        "metrics": document["metrics"], "dataset": dataset_fingerprint,
    }
    if config.search is not None:  # left out without a search, so fingerprints from before searches stand
        material["search"] = document["search"]
    canonical = json.dumps(material, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(canonical.encode("ascii")).hexdigest()


def _resolve_features(
    model: ModelSpec, dataset: Mapping[str, Any], kinds: Mapping[str, str], reserved: set[str],
    problems: _Problems,
) -> list[str]:
    if model.features is None:
        skip = reserved | {dataset.get("group_column"), dataset.get("time_column")}
        return [name for name, kind in kinds.items() if name not in skip and kind != "datetime"]
    if not model.features:
        problems.add("/model/features", "features must list at least one column, got an empty list")
    seen: set[str] = set()
    for i, name in enumerate(model.features):
        pointer = f"/model/features/{i}"
        if name not in kinds:
            problems.add(pointer, f"feature {name!r} is not a column of the dataset; columns: "
                         f"{', '.join(k for k in kinds if k not in reserved)}")
        elif name in reserved:
            problems.add(pointer, f"feature {name!r} is the dataset's target or id column and cannot be a feature")
        elif kinds[name] == "datetime":
            problems.add(pointer, f"feature {name!r} is a datetime column; derive numeric features from it first")
        elif name in seen:
            problems.add(pointer, f"feature {name!r} is listed twice")
        seen.add(name)
    return list(model.features)


def _resolve_steps(
    model: ModelSpec, features: list[str], problems: _Problems, catalog: CatalogView
) -> tuple[PreprocessStep, ...]:
    """Check the preprocess steps; steps on exactly the same columns chain, in the order given."""
    steps: list[PreprocessStep] = []
    owner: dict[str, tuple[int, tuple[str, ...]]] = {}
    for i, step in enumerate(model.preprocess):
        base = f"/model/preprocess/{i}"
        if not catalog.is_transformer(step.transformer):
            problems.add(f"{base}/transformer", f"transformer {step.transformer!r} is not in the catalog; "
                         f"use one of: {', '.join(catalog.transformer_names())}")
        if not step.columns:
            problems.add(f"{base}/columns", "columns must list at least one feature, got an empty list")
        for j, column in enumerate(step.columns):
            if column not in features:
                problems.add(f"{base}/columns/{j}", f"column {column!r} is not among the features "
                             f"({', '.join(features)})")
                continue
            first = owner.setdefault(column, (i, step.columns))
            if first[1] != step.columns and first[0] != i:
                problems.add(f"{base}/columns/{j}", f"column {column!r} is already in step {first[0]} with "
                             "other columns; steps chain only when they name exactly the same columns")
        steps.append(PreprocessStep(step.transformer, tuple(step.columns), dict(step.params)))
    return tuple(steps)


def _check_categoricals(
    features: list[str], kinds: Mapping[str, str], steps: tuple[PreprocessStep, ...], native: tuple[str, ...],
    problems: _Problems,
) -> None:
    encoded = {c for s in steps if s.transformer in ENCODERS for c in s.columns} | set(native)
    for i, name in enumerate(features):
        if kinds.get(name) == "categorical" and name not in encoded:
            problems.add(f"/model/features/{i}", f"feature {name!r} is categorical and needs an encoder: add a "
                         f"preprocess step with {' or '.join(sorted(ENCODERS))} for it, or, with an estimator "
                         "that handles categories itself, list it in model.categorical_features")


def _resolve_metrics(
    requested: tuple[MetricRequest, ...] | None, task: str, dataset: Mapping[str, Any], problems: _Problems
) -> list[str]:
    """Resolve each requested metric to its key, every choice spelled out (``service.catalog.metric_keys``)."""
    classes = [str(c) for c in dataset.get("classes") or []] if task == "classification" else None
    if requested is None:
        return [resolve_metric(name, task, classes) for name in DEFAULT_METRICS[task]]
    if not requested:
        problems.add("/metrics", "metrics must name at least one metric, got an empty list")
    keys: list[str] = []
    for i, item in enumerate(requested):
        try:
            key = resolve_metric(item, task, classes)
        except MetricRefused as exc:
            problems.add(f"/metrics/{i}", str(exc))
            continue
        if key == "brier" and classes is not None and len(classes) > 2:
            problems.add(f"/metrics/{i}", f"metric 'brier' needs a binary target; this one has {len(classes)} classes")
        keys.append(key)
    return list(dict.fromkeys(keys))


def _resolve_plan(
    validation: ValidationSpec, dataset_plan: Mapping[str, Any], problems: _Problems
) -> ValidationPlan:
    if validation.test is not None:
        return _five_by_two(validation, dataset_plan, problems)
    folds = dataset_plan["folds"] if validation.folds is None else validation.folds
    if not 2 <= folds <= MAX_FOLDS:
        problems.add("/validation/folds", f"folds must be between 2 and {MAX_FOLDS}, got {folds}")
    if not 1 <= validation.repeats <= MAX_REPEATS:
        problems.add("/validation/repeats", f"repeats must be between 1 and {MAX_REPEATS}, "
                     f"got {validation.repeats}")
    if dataset_plan["scheme"] in ("time", "contiguous") and validation.repeats != 1:
        problems.add("/validation/repeats", f"repeats must be 1 for a {dataset_plan['scheme']} fold plan (its "
                     f"folds do not depend on a seed), got {validation.repeats}")
    if folds * validation.repeats > MAX_FOLD_JOBS:
        problems.add("/validation", f"folds x repeats must be at most {MAX_FOLD_JOBS}, "
                     f"got {folds} x {validation.repeats}")
    return ValidationPlan(
        scheme=dataset_plan["scheme"], folds=folds, seed=dataset_plan["seed"],
        repeats=validation.repeats, plan_overridden=folds != dataset_plan["folds"],
    )


def _five_by_two(validation: ValidationSpec, dataset_plan: Mapping[str, Any], problems: _Problems) -> ValidationPlan:
    """Dietterich's (1998) 5x2cv: five repeats of 2-fold CV on the dataset's scheme and seeds."""
    if validation.test != "5x2cv":
        problems.add("/validation/test", f"test must be '5x2cv' or left out, got {validation.test!r}")
    if dataset_plan["scheme"] in ("time", "contiguous"):
        problems.add("/validation/test", f"5x2cv needs shuffled folds; this dataset's fold plan is "
                     f"{dataset_plan['scheme']}")
    if validation.folds not in (None, 2) or validation.repeats not in (1, 5):
        problems.add("/validation", "5x2cv fixes folds at 2 and repeats at 5; leave folds and repeats out, "
                     f"got folds={validation.folds}, repeats={validation.repeats}")
    return ValidationPlan(scheme=dataset_plan["scheme"], folds=2, seed=dataset_plan["seed"], repeats=5,
                          plan_overridden=dataset_plan["folds"] != 2, test="5x2cv")


def _resolve_curve(sizes: tuple[float, ...], problems: _Problems) -> tuple[float, ...]:
    """Check learning-curve sizes: fractions in (0, 1] of each training fold, increasing."""
    chosen = list(sizes) or list(LEARNING_CURVE_DEFAULT)
    if len(chosen) > 10:
        problems.add("/validation/learning_curve", f"learning_curve takes at most 10 sizes, got {len(chosen)}")
    for i, size in enumerate(chosen):
        if not 0 < size <= 1:
            problems.add(f"/validation/learning_curve/{i}", f"sizes are fractions of a training fold in (0, 1], "
                         f"got {size}")
    if chosen != sorted(set(chosen)):
        problems.add("/validation/learning_curve", f"sizes must increase without repeats, got {chosen}")
    return tuple(chosen)


def _resolve_search(
    search: SearchSpec | None, model: ModelSpec, plan: ValidationPlan, problems: _Problems
) -> SearchSpec | None:
    """Check a nested search against the caps; parameter values are checked by scikit-learn in a worker."""
    if search is None:
        return None
    if (search.grid is None) == (search.distributions is None):
        problems.add("/search", "search takes exactly one of grid or distributions")
        return None
    if not 2 <= search.inner_folds <= MAX_INNER_FOLDS:
        problems.add("/search/inner_folds", f"inner_folds must be between 2 and {MAX_INNER_FOLDS}, "
                     f"got {search.inner_folds}")
    space = search.grid if search.grid is not None else search.distributions
    assert space is not None
    kind = "grid" if search.grid is not None else "distributions"
    for name in space:
        if name in model.params:
            problems.add(f"/search/{kind}/{name}", f"parameter {name!r} is both fixed in model.params and "
                         "searched; keep it in one place")
    if search.grid is not None:
        candidates = 1
        for name, values in search.grid.items():
            if not values:
                problems.add(f"/search/grid/{name}", f"grid values for {name!r} must be a non-empty list")
            candidates *= max(1, len(values))
    else:
        candidates = search.n_iter or 0
        if not 1 <= candidates <= MAX_CANDIDATES:
            problems.add("/search/n_iter", f"n_iter must be between 1 and {MAX_CANDIDATES}, got {search.n_iter}")
    if candidates > MAX_CANDIDATES:
        problems.add("/search/grid", f"the grid has {candidates} combinations; at most {MAX_CANDIDATES} are allowed")
    outer = plan.folds * plan.repeats
    # A learning curve reruns the search at every size but the last (the full fold is reused).
    per_fold = max(1, len(plan.learning_curve or ()))
    fits = candidates * search.inner_folds * outer * per_fold
    if fits > MAX_SEARCH_FITS:
        sizes = f" x {per_fold} learning-curve sizes" if per_fold > 1 else ""
        problems.add("/search", f"the search needs {candidates} candidates x {search.inner_folds} inner folds x "
                     f"{outer} outer folds{sizes} = {fits} fits; at most {MAX_SEARCH_FITS} are allowed")
    return SearchSpec(
        grid=None if search.grid is None else {k: tuple(v) for k, v in search.grid.items()},
        distributions=None if search.distributions is None else dict(search.distributions),
        n_iter=search.n_iter, inner_folds=search.inner_folds,
    )
