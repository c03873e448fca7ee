"""Checks of a model's estimator-specific structure: nested estimators, named target functions, native categories.

Part of resolution (``service.submission.config.resolve``): what the catalog knows, checked by the API
before any worker sees the configuration. Parameter values, nested ones included, are checked by
scikit-learn (or the catalog's constraints) in the worker's check job.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any, Protocol

from service.submission.resolved import PreprocessStep

Add = Callable[[str, str], None]  # records a problem: (JSON pointer, detail)


class CatalogView(Protocol):
    """What resolution needs from the catalog (``service.catalog``)."""

    def estimator_task(self, name: str) -> str | None: ...

    def is_transformer(self, name: str) -> bool: ...

    def estimator_names(self, task: str) -> list[str]: ...

    def transformer_names(self) -> list[str]: ...

    def native_categorical_names(self) -> list[str]: ...

    def nested_of(self, name: str) -> Mapping[str, Mapping[str, Any]]: ...

    def target_functions_of(self, name: str) -> Mapping[str, str]: ...


def check_nested(
    estimator: str, params: Mapping[str, Any], task: str, catalog: CatalogView, add: Add
) -> None:
    """Check the nested estimators of an ensemble, calibration or target transformation, and named functions.

    A nested estimator is ``{"estimator": name, "params": {...}}`` (a list member also has a ``name``):
    a catalog estimator of the same task that nests nothing itself. Its parameter values are checked
    by scikit-learn in the worker, as the outer estimator's are.
    """
    for param, rule in catalog.nested_of(estimator).items():
        if param not in params or params[param] is None:
            continue
        base = f"/model/params/{param}"
        value = params[param]
        if rule["form"] == "one":
            _check_member(value, base, task, catalog, add, named=False)
            continue
        if not isinstance(value, list) or not value:
            add(base, f"{param} must be a non-empty list of {{\"name\", \"estimator\", \"params\"}} "
                         f"objects, got {value!r}")
            continue
        if len(value) > rule["max_members"]:
            add(base, f"{param} may list at most {rule['max_members']} estimators (a service cap), got "
                         f"{len(value)}")
        names = [m.get("name") for m in value if isinstance(m, dict)]
        for i, member in enumerate(value):
            _check_member(member, f"{base}/{i}", task, catalog, add, named=True)
            name = member.get("name") if isinstance(member, dict) else None
            if isinstance(name, str) and names.count(name) > 1 and names.index(name) < i:
                add(f"{base}/{i}/name", f"member name {name!r} is used twice")
    functions = catalog.target_functions_of(estimator)
    if functions:
        _check_target_functions(params, functions, add)


def _check_member(
    member: Any, base: str, task: str, catalog: CatalogView, add: Add, *, named: bool
) -> None:
    allowed = {"estimator", "params", *({"name"} if named else set())}
    if not isinstance(member, dict) or not isinstance(member.get("estimator"), str) or set(member) - allowed:
        shape = '{"name": ..., "estimator": ..., "params": {...}}' if named else '{"estimator": ..., "params": {...}}'
        add(base, f"a nested estimator is an object {shape}, got {member!r}")
        return
    name = member["estimator"]
    member_task = catalog.estimator_task(name)
    plain = [n for n in catalog.estimator_names(task) if not catalog.nested_of(n)]
    if member_task != task or catalog.nested_of(name):
        what = ("is not in the catalog" if member_task is None else
                f"is a {member_task} estimator" if member_task != task else "nests estimators itself")
        add(f"{base}/estimator", f"nested estimator {name!r} {what}; use one of: {', '.join(plain)}")
    if not isinstance(member.get("params", {}), dict):
        add(f"{base}/params", f"params must be an object, got {member.get('params')!r}")
    if named:
        label = member.get("name")
        if not (isinstance(label, str) and label.isidentifier() and "__" not in label):
            add(f"{base}/name", f"a member name is an identifier without '__', got {label!r}")


def _check_target_functions(params: Mapping[str, Any], functions: Mapping[str, str], add: Add) -> None:
    func, inverse = params.get("func"), params.get("inverse_func")
    pairs = ", ".join(f"{f!r} (inverse_func {i!r})" for f, i in functions.items())
    if func is None and inverse is not None:
        add("/model/params/inverse_func", "inverse_func needs a func; name one of " + pairs)
    elif func is not None and func not in functions:
        add("/model/params/func", f"func is named from an allow-list: {pairs}; got {func!r}")
    elif func is not None and inverse not in (None, functions[func]):
        add("/model/params/inverse_func", f"the inverse of {func!r} is {functions[func]!r}; leave "
                     f"inverse_func out or name it, got {inverse!r}")


def check_native(
    estimator: str, declared: tuple[str, ...], features: list[str], kinds: Mapping[str, str],
    steps: tuple[PreprocessStep, ...], catalog: CatalogView, add: Add,
) -> tuple[str, ...]:
    """Check the declared native categorical columns: a supporting estimator, categorical features, no step."""
    if not declared:
        return ()
    supporting = catalog.native_categorical_names()
    if estimator not in supporting:
        add("/model/categorical_features", f"estimator {estimator!r} has no native categorical "
                     f"support; use one of {', '.join(supporting)}, or encode the columns in a preprocess step")
        return ()
    stepped = {c for s in steps for c in s.columns}
    for i, name in enumerate(declared):
        pointer = f"/model/categorical_features/{i}"
        if name not in features:
            add(pointer, f"column {name!r} is not among the features ({', '.join(features)})")
        elif kinds.get(name) != "categorical":
            add(pointer, f"column {name!r} is {kinds.get(name)}; only categorical columns are taken as "
                         "native categories")
        elif name in stepped:
            add(pointer, f"column {name!r} is also in a preprocess step; a native categorical column is "
                         "handed to the estimator as it is")
        elif name in declared[:i]:
            add(pointer, f"column {name!r} is listed twice")
    return tuple(dict.fromkeys(declared))
