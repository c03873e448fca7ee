"""Check a configuration with scikit-learn's own parameter validation, plus the service's caps.

Each submitted parameter is validated on its own (``set_params`` then ``_validate_params``), so one
answer names every bad parameter at its JSON pointer, in scikit-learn's words. Only what needs
scikit-learn is checked here: the document was resolved by the API first
(``service.submission.config.resolve``), which owns catalog membership, the estimator's task, the
features and the columns of each step; facts the catalog knows (e.g. ``linear``) are read there.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils._param_validation import InvalidParameterError

from service.catalog import CatalogEntry, load_catalog
from service.errors import FieldProblem
from service.records import datasets
from service.submission.resolved import ResolvedConfig, SearchSpec
from worker.jobs.runtime import WorkerContext
from worker.jobs.trial_fit import trial_fit_problems
from worker.learning.pipeline import entry_for, make_instance


def check_config(ctx: WorkerContext, config_doc: Mapping[str, Any], dataset_id: str) -> dict[str, Any]:
    """Answer ``{"ok": true, "has_proba"}`` or ``{"ok": false, "problems": [...]}``.

    Valid parameters are then tried in a quick fit on a sample of development rows
    (``worker.jobs.trial_fit``), so a configuration that cannot fit at all is refused here.

    ``has_proba`` comes from the instance: whether ``predict_proba`` exists can depend on the
    parameters (``SVC(probability=True)``, ``SGDClassifier(loss="log_loss")``), which the catalog
    cannot say.
    """
    dataset = datasets.get_internal(ctx.engine, dataset_id)
    if dataset is None:
        return _rejected([FieldProblem("/dataset", f"no dataset {dataset_id!r}")])
    catalog = load_catalog()
    config = ResolvedConfig.from_document(config_doc)
    model = config.model
    problems: list[FieldProblem] = []
    entry = entry_for(catalog, model.estimator, "estimator")
    estimator = checked_instance(entry, model.params, "/model/params", problems)
    problems.extend(search_problems(entry, model.params, config.search))
    for i, step in enumerate(model.preprocess):
        step_entry = entry_for(catalog, step.transformer, "transformer")
        transformer = checked_instance(step_entry, step.params, f"/model/preprocess/{i}/params", problems)
        width = output_width_problem(step_entry, transformer, len(step.columns))
        if width is not None:
            problems.append(FieldProblem(f"/model/preprocess/{i}/columns", width))
    if problems:
        return _rejected(problems)
    problems = trial_fit_problems(ctx.settings, dataset, model)
    if problems:
        return _rejected(problems)
    return {"ok": True, "has_proba": hasattr(estimator, "predict_proba")}


def checked_instance(
    entry: CatalogEntry, params: Mapping[str, Any], base: str, problems: list[FieldProblem]
) -> BaseEstimator:
    """Validate each parameter alone; append problems; return the instance with the valid ones set."""
    valid: dict[str, Any] = {}
    for name, value in params.items():
        pointer = f"{base}/{name}"
        if name not in entry.params:
            problems.append(FieldProblem(pointer, f"{entry.name} has no parameter {name!r}; accepted: "
                                         f"{', '.join(entry.param_names)}"))
            continue
        if name in entry.forced and value != entry.forced[name]:
            problems.append(FieldProblem(pointer, f"{name} is fixed to {entry.forced[name]!r} by the service "
                                         f"(one core per fold job; scale out with more workers), got {value!r}"))
            continue
        over = value_size_problem(name, value) or dtype_problem(entry, name, value)
        if over is not None:  # before scikit-learn sees it: numpy sizes a dtype string as it parses it
            problems.append(FieldProblem(pointer, over))
            continue
        probe = make_instance(entry, {name: value})
        try:
            probe._validate_params()
        except InvalidParameterError as exc:
            problems.append(FieldProblem(pointer, str(exc)))
            continue
        over = cap_problem(entry, name, value)
        if over is not None:
            problems.append(FieldProblem(pointer, over))
            continue
        valid[name] = value
    instance = make_instance(entry, valid)
    instance._validate_params()  # each alone was valid; defaults and forced values are too
    return instance


def search_problems(
    entry: CatalogEntry, params: Mapping[str, Any], search: SearchSpec | None
) -> list[FieldProblem]:
    """Validate every searched value as scikit-learn would (set on the estimator, then validated), and caps.

    Each value is checked together with the submission's fixed parameters, at a pointer naming its
    position: ``/search/grid/alpha/1``; a uniform / log_uniform range checks both bounds.
    """
    if search is None:
        return []
    kind, space = ("grid", search.grid) if search.grid is not None else ("distributions", search.distributions)
    problems: list[FieldProblem] = []
    for name, spec in (space or {}).items():
        base = f"/search/{kind}/{name}"
        if isinstance(spec, Mapping):
            ranges = [k for k in ("uniform", "log_uniform") if k in spec]
            bounds = spec.get(ranges[0]) if len(ranges) == 1 and len(spec) == 1 else None
            if not (isinstance(bounds, list) and len(bounds) == 2
                    and all(isinstance(b, numbers.Real) and not isinstance(b, bool) for b in bounds)
                    and bounds[0] < bounds[1] and (ranges[0] == "uniform" or bounds[0] > 0)):
                problems.append(FieldProblem(base, f"a distribution is a list of values or {{\"uniform\": [low, "
                                             f"high]}} / {{\"log_uniform\": [low, high]}} with low < high (and "
                                             f"low > 0 for log_uniform), got {dict(spec)!r}"))
                continue
            values, pointers = list(bounds), [f"{base}/{ranges[0]}/{i}" for i in range(2)]
        elif isinstance(spec, list | tuple):  # a grid's values are a tuple, a distribution's a JSON list
            values, pointers = list(spec), [f"{base}/{i}" for i in range(len(spec))]
        else:
            problems.append(FieldProblem(base, f"searched values for {name!r} must be a list, got {spec!r}"))
            continue
        for value, pointer in zip(values, pointers, strict=True):
            found: list[FieldProblem] = []
            checked_instance(entry, {**params, name: value}, "/search", found)
            problems.extend(FieldProblem(pointer, p.detail) for p in found if p.pointer == f"/search/{name}")
    return problems


def value_size_problem(name: str, value: Any) -> str | None:
    """Return why a value's strings or lists exceed the catalog's value caps (``value_caps``), or None."""
    caps = load_catalog().document.get("value_caps", {})
    longest, most = int(caps.get("max_string_length", 256)), int(caps.get("max_list_items", 10_000))
    pending = [value]
    while pending:
        item = pending.pop()
        if isinstance(item, str) and len(item) > longest:
            return (f"{name}: strings may have at most {longest} characters (a service cap), got one of "
                    f"{len(item)}")
        if isinstance(item, list | tuple):
            if len(item) > most:
                return f"{name}: lists may have at most {most} items (a service cap), got {len(item)}"
            pending.extend(item)
        elif isinstance(item, Mapping):
            if len(item) > most:
                return f"{name}: objects may have at most {most} members (a service cap), got {len(item)}"
            pending.extend(item.keys())
            pending.extend(item.values())
    return None


def dtype_problem(entry: CatalogEntry, name: str, value: Any) -> str | None:
    """Return why an encoder's ``dtype`` is refused: only numeric types up to the cap's bytes per value."""
    cap = entry.caps.get(name, {}).get("max_itemsize_bytes")
    if cap is None:
        return None
    try:
        parsed = np.dtype(value)
    except (TypeError, ValueError):
        return f"{name} must name a numeric type such as 'float64', got {value!r}"
    if parsed.kind not in "biuf" or parsed.itemsize > cap:
        return (f"{name} must be a numeric type of at most {cap} bytes per value (a service cap), got {value!r} "
                f"({parsed.itemsize} bytes per value)")
    return None


def cap_problem(entry: CatalogEntry, name: str, value: Any) -> str | None:
    """Return why ``value`` exceeds the service cap on parameter ``name``, or None."""
    cap = entry.caps.get(name)
    if cap is None or value is None or isinstance(value, bool) or "max_itemsize_bytes" in cap:
        return None
    if name == "hidden_layer_sizes":
        sizes = [int(value)] if isinstance(value, numbers.Integral) else [int(v) for v in value]
        if len(sizes) > cap["max_layers"]:
            return f"hidden_layer_sizes may have at most {cap['max_layers']} layers (a service cap), got {value!r}"
        if sum(sizes) > cap["max_total_units"]:
            return (f"hidden_layer_sizes may total at most {cap['max_total_units']} units (a service cap), got "
                    f"{sum(sizes)} in {value!r}")
        return None
    largest = max(value) if isinstance(value, list | tuple) and value else value
    if isinstance(largest, numbers.Real) and float(largest) > cap["max"]:
        return f"{name} must be at most {cap['max']} (a service cap), got {value!r}"
    return None


def output_width_problem(entry: CatalogEntry, transformer: BaseEstimator, n_columns: int) -> str | None:
    """Return why a PolynomialFeatures step would produce too many columns, or None."""
    cap = entry.caps.get("output_features")
    if cap is None:
        return None
    degree = transformer.get_params()["degree"]
    highest = int(max(degree) if isinstance(degree, list | tuple) else degree)
    width = math.comb(n_columns + highest, highest)  # the full expansion, bias included: an upper bound
    if width > cap["max"]:
        return (f"{entry.name} of degree {highest} on {n_columns} columns makes up to {width} features; at most "
                f"{cap['max']} are allowed (a service cap): use fewer columns or a lower degree")
    return None


def _rejected(problems: list[FieldProblem]) -> dict[str, Any]:
    return {"ok": False, "problems": [{"pointer": p.pointer, "detail": p.detail} for p in problems]}
