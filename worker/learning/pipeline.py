"""Build the scikit-learn Pipeline a submission describes: preprocessing, then the estimator.

Preprocessing is a ColumnTransformer fitted inside each training fold, never on the whole data.
Steps naming exactly the same columns chain in the order given; columns no step names pass through
unchanged. Numeric-only inputs are numpy arrays (columns by position); inputs with a categorical
feature are pandas frames (columns by name). Numeric input with no preprocess steps goes to the
estimator as it is: a ColumnTransformer that only passes columns through would copy the whole
matrix twice per fit and once per prediction (about half a second per fold at a million rows)
and change no number.
"""

from __future__ import annotations

import contextlib
import importlib
from collections.abc import Mapping, Sequence
from contextlib import AbstractContextManager
from typing import Any

import numpy as np
import sklearn
from sklearn.base import BaseEstimator, clone
from sklearn.compose import ColumnTransformer
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.experimental import enable_iterative_imputer  # noqa: F401  (IterativeImputer is experimental)
from sklearn.pipeline import Pipeline

from service.catalog import Catalog, CatalogEntry, load_catalog
from service.submission.resolved import PreprocessStep, ResolvedModel
from worker.learning.categories import STEP_NAME as NATIVE_STEP
from worker.learning.categories import CategoryCodes, native_categorical_params

PREPROCESS_STEP = "preprocess"
MODEL_STEP = "model"
BASELINES: dict[str, tuple[str, dict[str, str]]] = {
    "regression": ("DummyRegressor", {"strategy": "mean"}),
    "classification": ("DummyClassifier", {"strategy": "prior"}),
}


def uses_frame(features: Sequence[str], column_kinds: Mapping[str, str]) -> bool:
    """Tell whether the features need a pandas frame (any is not numeric) rather than a numpy array."""
    return any(column_kinds[name] != "numeric" for name in features)


def entry_for(catalog: Catalog, name: str, kind: str) -> CatalogEntry:
    """Look up an allow-listed class; a name outside the catalog is a caller's error, not a user's.

    The API rejects such a name at its JSON pointer before any document reaches a worker
    (``service.submission.config.resolve``). The check stays here as the last guard in front of
    ``importlib``, for a job called directly with a document the API never resolved.
    """
    entry = catalog.estimator(name) if kind == "estimator" else catalog.transformer(name)
    if entry is None:
        raise LookupError(f"{kind} {name!r} is not in the catalog; documents are resolved by the API first")
    return entry


def effective_params(entry: CatalogEntry, params: Mapping[str, Any]) -> dict[str, Any]:
    """Merge service defaults, the submission's parameters and the forced values, in that order."""
    return {**entry.service_defaults, **params, **entry.forced}


# TransformedTargetRegressor's functions, by the names the catalog allows (never code from a request).
TARGET_FUNCTIONS: dict[str, Any] = {"log1p": np.log1p, "expm1": np.expm1, "sqrt": np.sqrt, "square": np.square}


def make_instance(entry: CatalogEntry, params: Mapping[str, Any], catalog: Catalog | None = None) -> BaseEstimator:
    """Instantiate an allow-listed class with its effective parameters (validated later, by fit).

    Nested estimators (``{"estimator": name, "params": {...}}``, list members with a ``name``) are
    built the same way from their own catalog entries; named target functions become numpy's.
    """
    cls = getattr(importlib.import_module(entry.module), entry.name)
    instance: BaseEstimator = cls(estimators=[]) if "estimators" in entry.nested else cls()
    values = effective_params(entry, params)
    converted: dict[str, Any] = {}
    for name, value in values.items():
        if name in entry.nested and value is not None:
            converted[name] = _nested(catalog or load_catalog(), value)
        elif name in ("func", "inverse_func") and entry.target_functions and isinstance(value, str):
            converted[name] = TARGET_FUNCTIONS[value]
        else:
            converted[name] = from_json(cls, name, value)
    func = values.get("func")
    if isinstance(func, str) and entry.target_functions and values.get("inverse_func") is None:
        converted["inverse_func"] = TARGET_FUNCTIONS[entry.target_functions[func]]
    instance.set_params(**converted)
    return instance


def _nested(catalog: Catalog, value: Any) -> Any:
    """Build a nested estimator, or the (name, estimator) list of an ensemble's members."""
    if isinstance(value, list):
        return [(str(m["name"]), _nested(catalog, m)) for m in value]
    member = entry_for(catalog, str(value["estimator"]), "estimator")
    return make_instance(member, value.get("params") or {}, catalog)


def from_json(cls: type[BaseEstimator], name: str, value: Any) -> Any:
    """Turn a JSON list into the tuple scikit-learn wants, unless the parameter takes lists as such.

    JSON has no tuples, yet e.g. ``MinMaxScaler(feature_range=(0, 1))`` and a
    ``PolynomialFeatures(degree=(1, 3))`` range accept only tuples; array-likes take either.
    """
    if not isinstance(value, list):
        return value
    constraints = getattr(cls, "_parameter_constraints", {}).get(name, [])
    if constraints == "no_validation" or list in constraints:
        return value
    return tuple(value)


def build_pipeline(
    model: ResolvedModel, column_kinds: Mapping[str, str], catalog: Catalog | None = None
) -> Pipeline:
    """Return the unfitted pipeline for the model part of a resolved configuration."""
    catalog = catalog or load_catalog()
    features = list(model.features)
    estimator = make_instance(entry_for(catalog, model.estimator, "estimator"), model.params, catalog)
    native = list(model.categorical_features)
    if native:
        estimator.set_params(**native_categorical_params(model.estimator, native))
    steps = model.preprocess
    by_name = uses_frame(features, column_kinds)
    if not steps and not by_name:
        return Pipeline([(MODEL_STEP, estimator)])
    # A frame keeps the ColumnTransformer even without steps: it hands the estimator the numpy
    # matrix it always saw, where a frame would change what some estimators do with its dtypes.
    return Pipeline([(PREPROCESS_STEP, build_preprocessing(catalog, steps, features, by_name, native)),
                     (MODEL_STEP, estimator)])


def build_preprocessing(
    catalog: Catalog, steps: Sequence[PreprocessStep], features: Sequence[str], by_name: bool,
    native: Sequence[str] = (),
) -> ColumnTransformer:
    """Return the ColumnTransformer for the preprocess steps; unnamed columns pass through.

    The steps are the resolved ones: every column is a feature and steps share a column only when
    they name exactly the same columns (``service.submission.config.resolve`` checks both).
    Declared native categorical columns (``native``) come first, as pandas categoricals
    (``worker.learning.categories``), and the output is then a pandas frame (dense: a frame holds no
    sparse block), so the estimator sees their dtype and names.
    """
    chains: dict[tuple[str, ...], list[int]] = {}
    for i, step in enumerate(steps):
        chains.setdefault(tuple(step.columns), []).append(i)

    position = {name: k for k, name in enumerate(features)}
    transformers: list[tuple[str, Any, list[Any]]] = []
    for columns, indices in chains.items():
        parts = [
            (f"{steps[i].transformer.lower()}{i}",
             make_instance(entry_for(catalog, steps[i].transformer, "transformer"), steps[i].params))
            for i in indices
        ]
        selector: list[Any] = list(columns) if by_name else [position[c] for c in columns]
        if len(parts) == 1:
            transformers.append((parts[0][0], parts[0][1], selector))
        else:
            name = "chain" + "_".join(str(i) for i in indices)
            transformers.append((name, Pipeline(parts), selector))
    if not native:
        return ColumnTransformer(transformers, remainder="passthrough", verbose_feature_names_out=False)
    selector = list(native) if by_name else [position[c] for c in native]
    transformers.insert(0, (NATIVE_STEP, CategoryCodes(), selector))
    return ColumnTransformer(transformers, remainder="passthrough", verbose_feature_names_out=False,
                             sparse_threshold=0.0).set_output(transform="pandas")


def output_feature_names(pipeline: Pipeline, features: Sequence[str]) -> list[str]:
    """Name the columns the fitted preprocessing hands to the estimator, from the input feature names.

    Names carry no step prefix unless two outputs would collide; without preprocessing they are
    the features themselves.
    """
    if PREPROCESS_STEP not in pipeline.named_steps:
        return [str(f) for f in features]
    preprocess: ColumnTransformer = pipeline.named_steps[PREPROCESS_STEP]
    try:
        names = preprocess.get_feature_names_out(list(features))
    except ValueError:  # duplicate short names: fall back to scikit-learn's prefixed names
        preprocess.verbose_feature_names_out = True
        names = preprocess.get_feature_names_out(list(features))
    return [str(n) for n in names]


def baseline_estimator(task: str) -> BaseEstimator:
    """Return the trivial model every candidate is compared with on the same rows."""
    name, params = BASELINES[task]
    return DummyRegressor(**params) if name == "DummyRegressor" else DummyClassifier(**params)


def baseline_description(task: str) -> dict[str, Any]:
    """Describe the baseline for the summary document."""
    name, params = BASELINES[task]
    return {"estimator": name, "params": dict(params)}


def fit_in_place(model: BaseEstimator, spec: ResolvedModel) -> BaseEstimator:
    """Return a copy of ``model`` whose final estimator may overwrite its training matrix (``copy_X=False``).

    Only for a fit whose input the service never reads again and that scikit-learn hands the
    estimator as a private array: the holdout refit, whose rows are a private copy of the memory
    map's (``DevelopmentData.copied_features``) or the fresh output of the preprocessing, and a
    fold whose training scores come from a copied sample. Linear models then centre that array in
    place instead of copying it once more -- some 25 ms and 160 MB at a million rows of 20 features
    -- and their coefficients are the same to the last bit (a test checks). ``model`` itself is
    left as it is (a learning curve clones it and scores its own input). A nested search, an
    estimator without ``copy_X`` and a submission that set ``copy_X`` get ``model`` back unchanged.
    """
    if not isinstance(model, Pipeline) or "copy_X" in spec.params:
        return model
    if "copy_X" not in model.named_steps[MODEL_STEP].get_params(deep=False):
        return model
    return clone(model).set_params(**{f"{MODEL_STEP}__copy_X": False})


def input_checked(
    model: BaseEstimator, finite_input: bool, catalog: Catalog | None = None
) -> AbstractContextManager[Any]:
    """Return the context to fit ``model`` in: scikit-learn's finite check of the input skipped where it is redundant.

    A fit's input validation scans the whole training matrix for NaN and infinity, twice for a
    linear model (about 12 ms a fold at a million rows of 20 features). When the registration
    already found every feature and target value finite (``DevelopmentData.finite``) and the
    estimator takes them as they are -- a pipeline of the estimator alone, an allow-listed one the
    catalog declares no nested estimators for -- the scan can only pass, so the fit runs under
    ``assume_finite``: the same fit, the same numbers. Preprocessing can make non-finite values of
    finite ones (a log, a division) and a nesting estimator checks arrays it computed (a stack's
    predictions, a transformed target), even with its nested estimator left at the default; so those,
    and input nobody checked, are fitted with every check in place.
    """
    if not finite_input or not isinstance(model, Pipeline) or [name for name, _ in model.steps] != [MODEL_STEP]:
        return contextlib.nullcontext()
    entry = (catalog or load_catalog()).estimator(type(model.named_steps[MODEL_STEP]).__name__)
    if entry is None or entry.nested:
        return contextlib.nullcontext()
    return sklearn.config_context(assume_finite=True)
