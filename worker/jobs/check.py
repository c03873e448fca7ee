"""Check a configuration with scikit-learn's own parameter validation, plus the service's caps.

Each submitted parameter is validated on its own (``set_params`` then ``_validate_params``), so one
answer names every bad parameter at its JSON pointer, in scikit-learn's words. Only what needs
scikit-learn is checked here: the document was resolved by the API first
(``service.submission.config.resolve``), which owns catalog membership, the estimator's task, the
features and the columns of each step; facts the catalog knows (e.g. ``linear``) are read there.
"""

from __future__ import annotations

import json
import math
import numbers
from collections.abc import Mapping
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils._param_validation import InvalidParameterError, StrOptions

from service.catalog import CatalogEntry, load_catalog
from service.catalog.constraints import problem as constraint_problem
from service.catalog.metric_keys import target_floor
from service.errors import FieldProblem
from service.records import datasets
from service.submission.resolved import ResolvedConfig, SearchSpec
from service.vault import store
from worker.jobs import runtime
from worker.jobs.runtime import WorkerContext
from worker.jobs.trial_fit import trial_fit_problems
from worker.learning.development import target_values
from worker.learning.pipeline import entry_for, make_instance
from worker.learning.target_domain import target_domain


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
    runtime.ensure_development(dataset_id)
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
    problems.extend(target_range_problems(ctx, config, dataset_id))
    if problems:
        return _rejected(problems)
    domain = target_domain(model.estimator, model.params) if config.task == "regression" else None
    if domain is not None:
        frame = store.load_development_frame(ctx.settings, dataset_id, columns=[config.target])
        outside = domain.problem(target_values(frame[config.target], "regression"))
        if outside is not None:
            chosen = next((f"/model/params/{p}" for p in ("objective", "loss", "power", "func") if p in model.params),
                          "/model/estimator")
            return _rejected([FieldProblem(chosen, outside)])
    problems = trial_fit_problems(ctx.settings, dataset, model)
    if problems:
        return _rejected(problems)
    if hasattr(estimator, "predict_proba") or config.task != "classification":
        return {"ok": True, "has_proba": hasattr(estimator, "predict_proba")}
    return {"ok": True, "has_proba": False, "proba_settings": probability_settings(entry, model.params)}


def target_range_problems(ctx: WorkerContext, config: ResolvedConfig, dataset_id: str) -> list[FieldProblem]:
    """Refuse a deviance the development target's values leave undefined (e.g. gamma on a target with zeros).

    Reads the target of the development rows only (the sealed rows are never opened here), and
    only when a metric asks for a range.
    """
    floors: dict[int, tuple[float, bool]] = {}
    for i, key in enumerate(config.metrics):
        needed = target_floor(key) if config.task == "regression" else None
        if needed is not None:
            floors[i] = needed
    if not floors:
        return []
    dataset = datasets.get_internal(ctx.engine, dataset_id)
    assert dataset is not None  # checked by the caller
    target = str(dataset["target"])
    lowest = float(store.load_development_frame(ctx.settings, dataset_id, columns=[target])[target].min())
    problems: list[FieldProblem] = []
    for i, (floor, strict) in floors.items():
        if lowest < floor or (strict and lowest == floor):
            needs = f"> {floor:g}" if strict else f">= {floor:g}"
            problems.append(FieldProblem(f"/metrics/{i}", f"metric {config.metrics[i]!r} is defined only for a "
                                         f"target {needs}; the development rows' {target} goes down to {lowest:g}"))
    return problems


def probability_settings(entry: CatalogEntry, params: Mapping[str, Any]) -> list[str]:
    """Return the single parameter changes that would give the estimator ``predict_proba``.

    Tries every value of each parameter that takes a boolean or a word (scikit-learn's
    ``_parameter_constraints``; deprecated words and values the service fixes left out), e.g.
    ``probability=true`` for SVC, ``loss="log_loss"`` for SGDClassifier. Written as JSON, as a
    submission writes them.
    """
    cls = type(make_instance(entry, {}))
    found: list[str] = []
    for name, allowed in getattr(cls, "_parameter_constraints", {}).items():
        if name in entry.forced or name not in entry.params:
            continue
        values: list[Any] = []
        for constraint in allowed:
            if constraint == "boolean":
                values += [True, False]
            elif isinstance(constraint, StrOptions):
                values += sorted(constraint.options - constraint.deprecated)
        for value in values:
            if name in params and params[name] == value:
                continue
            try:
                probe = make_instance(entry, {**params, name: value})
            except (TypeError, ValueError):
                continue
            if hasattr(probe, "predict_proba"):
                found.append(f"{name}={json.dumps(value)}")
    return found


def checked_instance(
    entry: CatalogEntry, params: Mapping[str, Any], base: str, problems: list[FieldProblem]
) -> BaseEstimator:
    """Validate each parameter alone; append problems; return the instance with the valid ones set."""
    valid: dict[str, Any] = {}
    for name, value in params.items():
        pointer = f"{base}/{name}"
        if name in entry.withheld:
            problems.append(FieldProblem(pointer, f"{name} cannot be set on {entry.name}: {entry.withheld[name]}"))
            continue
        if name not in entry.params:
            problems.append(FieldProblem(pointer, f"{entry.name} has no parameter {name!r}; accepted: "
                                         f"{', '.join(entry.param_names)}"))
            continue
        if name in entry.forced and value != entry.forced[name]:
            problems.append(FieldProblem(pointer, f"{name} is fixed to {entry.forced[name]!r} by the service "
                                         f"(one core per fold job; scale out with more workers), got {value!r}"))
            continue
        if entry.target_functions and name in ("func", "inverse_func"):
            valid[name] = value  # named from the allow-list, which the API checked
            continue
        if name in entry.nested:
            # The API checked the nesting; each member's values are checked here, as the outer ones are.
            members = value if isinstance(value, list) else [] if value is None else [value]
            before = len(problems)
            for k, member in enumerate(members):
                where = f"{pointer}/{k}" if isinstance(value, list) else pointer
                member_entry = entry_for(load_catalog(), member["estimator"], "estimator")
                checked_instance(member_entry, member.get("params") or {}, f"{where}/params", problems)
            if len(problems) == before:
                valid[name] = value
            continue
        over = value_size_problem(name, value) or dtype_problem(entry, name, value)
        if over is not None:  # before scikit-learn sees it: numpy sizes a dtype string as it parses it
            problems.append(FieldProblem(pointer, over))
            continue
        invalid = parameter_problem(entry, name, value)
        if invalid is not None:
            problems.append(FieldProblem(pointer, invalid))
            continue
        narrowed = entry.restricted.get(name)
        if narrowed is not None and value not in narrowed["values"]:
            accepted = ", ".join(repr(v) for v in narrowed["values"])
            problems.append(FieldProblem(pointer, f"{name} must be one of {accepted} here ({narrowed['why']}), "
                                         f"got {value!r}"))
            continue
        over = cap_problem(entry, name, value)
        if over is not None:
            problems.append(FieldProblem(pointer, over))
            continue
        valid[name] = value
    instance = make_instance(entry, valid)
    if not entry.constraints:
        instance._validate_params()  # each alone was valid; defaults and forced values are too
    return instance


def parameter_problem(entry: CatalogEntry, name: str, value: Any) -> str | None:
    """Return why ``value`` is not valid for parameter ``name``, in scikit-learn's words, or None.

    scikit-learn's classes validate themselves (``_validate_params``); LightGBM's and XGBoost's do
    not, and are checked against the constraints their catalog entry states.
    """
    if entry.constraints:
        return constraint_problem(entry.name, name, entry.constraints[name], value)
    probe = make_instance(entry, {name: value})
    try:
        probe._validate_params()
    except InvalidParameterError as exc:
        return str(exc)
    return None


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
    if isinstance(largest, numbers.Real) and "max" in cap and float(largest) > cap["max"]:
        return f"{name} must be at most {cap['max']} (a service cap), got {value!r}"
    smallest = min(value) if isinstance(value, list | tuple) and value else value
    if isinstance(smallest, numbers.Real) and "min" in cap and float(smallest) < cap["min"]:
        return f"{name} must be at least {cap['min']} (a service cap), got {value!r}"
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
