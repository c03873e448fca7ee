"""Generate ``service/catalog/estimators.json``, the allow-list of estimators and transformers.

Run ``python -m worker.learning.catalog_gen`` after changing the allow-list or upgrading scikit-learn. The
API process reads the JSON without importing scikit-learn; ``catalog_drift`` lets a test fail when
the committed file no longer describes the installed scikit-learn.
"""

from __future__ import annotations

import importlib
import inspect
import json
import math
import numbers
from pathlib import Path
from typing import Any

import sklearn
from sklearn.base import BaseEstimator, is_classifier, is_regressor
from sklearn.utils._param_validation import Hidden, Options, StrOptions, make_constraint

CATALOG_PATH = Path(__file__).resolve().parents[2] / "service" / "catalog" / "estimators.json"

ESTIMATORS: tuple[str, ...] = (
    "LinearRegression", "Ridge", "Lasso", "ElasticNet", "SGDRegressor", "LogisticRegression", "SGDClassifier",
    "KNeighborsRegressor", "KNeighborsClassifier", "SVR", "SVC", "DecisionTreeRegressor",
    "DecisionTreeClassifier", "RandomForestRegressor", "RandomForestClassifier", "ExtraTreesRegressor",
    "ExtraTreesClassifier", "GradientBoostingRegressor", "GradientBoostingClassifier",
    "HistGradientBoostingRegressor", "HistGradientBoostingClassifier", "MLPRegressor", "MLPClassifier",
    "DummyRegressor", "DummyClassifier",
)
TRANSFORMERS: tuple[str, ...] = (
    "StandardScaler", "MinMaxScaler", "RobustScaler", "OneHotEncoder", "OrdinalEncoder", "SimpleImputer",
    "PolynomialFeatures",
)
_PUBLIC_MODULES: tuple[str, ...] = (
    "sklearn.linear_model", "sklearn.neighbors", "sklearn.svm", "sklearn.tree", "sklearn.ensemble",
    "sklearn.neural_network", "sklearn.dummy", "sklearn.preprocessing", "sklearn.impute",
)
# Fitted models that expose ``coef_`` whatever their parameters; their coefficients are recorded per fold.
_LINEAR: frozenset[str] = frozenset({
    "LinearRegression", "Ridge", "Lasso", "ElasticNet", "SGDRegressor", "LogisticRegression", "SGDClassifier",
})
_TREE_DEPTH_CAP = 64
_ITERATION_CAP = 10_000
_ENSEMBLE_CAP = 500
_POLYNOMIAL_OUTPUT_CAP = 10_000
_NEIGHBOURS_CAP = 1_000  # k-NN keeps test rows x k distances and indices
_FUNCTION_CALLS_CAP = 50_000  # MLP's L-BFGS max_fun (default 15000)
_DTYPE_ITEMSIZE_CAP = 8  # bytes per value of an encoder's output: numeric types only
# Any parameter value: a string's length and a list's items (a 100,000-character dtype string once took a
# fold from 149 to 665 MB; a fill_value string is copied into every imputed cell).
VALUE_CAPS = {"max_string_length": 256, "max_list_items": 10_000}

# scikit-learn's constraint keywords, said in JSON terms (a submission can only send JSON values).
_PLAIN_WORDS: dict[str, str] = {
    "boolean": "a bool",
    "random_state": "an int in the range [0, 4294967295] or None",
    "verbose": "an int in the range [0, inf) or a bool",
    "array-like": "an array-like (a JSON list)",
    "sparse matrix": "a sparse matrix (not expressible in JSON)",
}

CAPS_NOTE = {
    "n_estimators": f"at most {_ENSEMBLE_CAP} trees or boosting stages",
    "max_iter": f"at most {_ITERATION_CAP} iterations; HistGradientBoosting* counts trees here, so at most "
                f"{_ENSEMBLE_CAP}; -1 (no limit, the SVM default) stays allowed",
    "hidden_layer_sizes": "at most 4 hidden layers and 1024 units in total",
    "max_depth": f"at most {_TREE_DEPTH_CAP} (None, grow until pure, stays allowed)",
    "degree": "PolynomialFeatures degree at most 3, the output width grows as columns**degree",
    "output_features": f"PolynomialFeatures may produce at most {_POLYNOMIAL_OUTPUT_CAP} columns, "
                       "counted as comb(columns + degree, degree)",
    "cache_size": "SVM kernel cache at most 1024 MB",
    "n_neighbors": f"at most {_NEIGHBOURS_CAP} neighbours",
    "max_fun": f"at most {_FUNCTION_CALLS_CAP} loss function calls",
    "dtype": f"a numeric type of at most {_DTYPE_ITEMSIZE_CAP} bytes per value (e.g. 'float64', 'float32', "
             "'int64'); string and object types are refused",
    "value_caps": f"every parameter value: strings of at most {VALUE_CAPS['max_string_length']} characters, "
                  f"lists of at most {VALUE_CAPS['max_list_items']} items (nested lists count their own items)",
    "forced": "parameters the service fixes (n_jobs=1: one core per fold job; verbose off: worker logs "
              "stay free of fitting chatter); a different value is rejected",
    "service_defaults": "defaults the service uses instead of scikit-learn's (random_state=0 so every "
                        "fold and the holdout refit are reproducible); a submission may override them",
}


def build_catalog() -> dict[str, Any]:
    """Describe every allow-listed class as the installed scikit-learn defines it."""
    return {
        "generated_by": "python -m worker.learning.catalog_gen",
        "sklearn_version": sklearn.__version__,
        "caps_note": CAPS_NOTE,
        "value_caps": VALUE_CAPS,
        "estimators": [_entry(name, "estimator") for name in sorted(ESTIMATORS)],
        "transformers": [_entry(name, "transformer") for name in sorted(TRANSFORMERS)],
    }


def render(catalog: dict[str, Any]) -> str:
    """Serialise deterministically: sorted keys, two-space indent, trailing newline."""
    return json.dumps(catalog, sort_keys=True, indent=2, ensure_ascii=True, allow_nan=False) + "\n"


def write_catalog(path: Path = CATALOG_PATH) -> Path:
    """Write the catalog file and return its path."""
    path.write_text(render(build_catalog()), encoding="utf-8")
    return path


def catalog_drift(path: Path = CATALOG_PATH) -> list[str]:
    """List the differences between the committed catalog and the installed scikit-learn.

    The recorded ``sklearn_version`` is informational and not compared: a release that changes
    nothing the catalog describes is not drift.
    """
    if not path.exists():
        return [f"{path} is missing; run python -m worker.learning.catalog_gen"]
    committed = json.loads(path.read_text(encoding="utf-8"))
    fresh = json.loads(render(build_catalog()))
    committed.pop("sklearn_version", None)
    fresh.pop("sklearn_version", None)
    return _differences(committed, fresh, "")


def estimator_class(name: str) -> type[BaseEstimator]:
    """Import an allow-listed class by name from its public scikit-learn module."""
    if name not in ESTIMATORS and name not in TRANSFORMERS:
        raise KeyError(f"{name!r} is not in the catalog allow-list")
    return _find_class(name)[1]


def _find_class(name: str) -> tuple[str, type[BaseEstimator]]:
    for module_name in _PUBLIC_MODULES:
        cls = getattr(importlib.import_module(module_name), name, None)
        if inspect.isclass(cls):
            return module_name, cls
    raise KeyError(f"{name!r} is not found in any of {', '.join(_PUBLIC_MODULES)}")


def _entry(name: str, kind: str) -> dict[str, Any]:
    module_name, cls = _find_class(name)
    instance = cls()
    defaults = instance.get_params(deep=False)
    constraints: dict[str, Any] = getattr(cls, "_parameter_constraints", {})
    forced: dict[str, Any] = {}
    if "n_jobs" in defaults:
        # A deprecated n_jobs has no effect and warns when set: keep it at its default instead.
        forced["n_jobs"] = defaults["n_jobs"] if _deprecated(cls, "n_jobs") else 1
    if "verbose" in defaults:
        forced["verbose"] = defaults["verbose"]  # 0 or False, whichever the class uses
    service_defaults: dict[str, Any] = {}
    if "random_state" in defaults and defaults["random_state"] is None:
        service_defaults["random_state"] = 0
    entry: dict[str, Any] = {
        "name": name,
        "kind": kind,
        "module": module_name,
        "params": {
            param: {"default": _json_value(value), "type": _describe(constraints.get(param)),
                    **({"deprecated": True} if _deprecated(cls, param) else {})}
            for param, value in sorted(defaults.items())
        },
        "forced": forced,
        "service_defaults": service_defaults,
        "caps": _caps(name, defaults),
    }
    if kind == "estimator":
        entry["task"] = "classification" if is_classifier(instance) else "regression"
        assert is_classifier(instance) or is_regressor(instance), name
        entry["linear"] = name in _LINEAR
        entry["has_predict_proba_by_default"] = hasattr(instance, "predict_proba")
    return entry


def _deprecated(cls: type[BaseEstimator], param: str) -> bool:
    """Tell whether the class docstring marks ``param`` deprecated (scikit-learn's own wording)."""
    doc = cls.__doc__ or ""
    return f"`{param}` is deprecated" in doc or f"`{param}` was deprecated" in doc


def _caps(name: str, defaults: dict[str, Any]) -> dict[str, dict[str, int]]:
    caps: dict[str, dict[str, int]] = {}
    if "n_estimators" in defaults:
        caps["n_estimators"] = {"max": _ENSEMBLE_CAP}
    if "max_iter" in defaults:
        caps["max_iter"] = {"max": _ENSEMBLE_CAP if name.startswith("HistGradientBoosting") else _ITERATION_CAP}
    if "hidden_layer_sizes" in defaults:
        caps["hidden_layer_sizes"] = {"max_layers": 4, "max_total_units": 1024}
    if "max_depth" in defaults:
        caps["max_depth"] = {"max": _TREE_DEPTH_CAP}
    if name == "PolynomialFeatures":
        caps["degree"] = {"max": 3}
        caps["output_features"] = {"max": _POLYNOMIAL_OUTPUT_CAP}
    if "cache_size" in defaults:
        caps["cache_size"] = {"max": 1024}
    if "n_neighbors" in defaults:
        caps["n_neighbors"] = {"max": _NEIGHBOURS_CAP}
    if "max_fun" in defaults:
        caps["max_fun"] = {"max": _FUNCTION_CALLS_CAP}
    if "dtype" in defaults:
        caps["dtype"] = {"max_itemsize_bytes": _DTYPE_ITEMSIZE_CAP}
    return caps


def _describe(constraints: Any) -> str:
    """Render scikit-learn's constraints of one parameter as a short, deterministic phrase."""
    if constraints is None:
        return "not validated by scikit-learn"
    if constraints == "no_validation":
        return "any value (not validated by scikit-learn)"
    parts: list[str] = []
    for raw in constraints:
        if isinstance(raw, Hidden):
            continue  # private or deprecated spellings scikit-learn does not advertise
        if isinstance(raw, str) and raw in _PLAIN_WORDS:
            parts.append(_PLAIN_WORDS[raw])
            continue
        constraint = make_constraint(raw)
        if isinstance(constraint, StrOptions):
            current = sorted(o for o in constraint.options if o not in constraint.deprecated)
            parts.append("one of " + ", ".join(repr(o) for o in current))
        elif isinstance(constraint, Options):
            parts.append("one of " + ", ".join(sorted(repr(o) for o in constraint.options)))
        elif raw is numbers.Integral or raw is int:
            parts.append("an int")
        elif raw is numbers.Real or raw is float:
            parts.append("a float")
        elif inspect.isclass(raw):
            parts.append(f"a {raw.__name__}")
        else:
            parts.append(str(constraint))
    return " or ".join(dict.fromkeys(parts))


def _json_value(value: Any) -> Any:
    """Return a JSON value for a default: plain JSON when it round-trips, else its repr."""
    if value is None or isinstance(value, bool | str):
        return value
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        as_float = float(value)
        return as_float if math.isfinite(as_float) else repr(as_float)
    if isinstance(value, list | tuple):
        return [_json_value(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _json_value(v) for k, v in value.items()}
    if inspect.isclass(value):
        return f"{value.__module__}.{value.__qualname__}"
    return repr(value)


def _differences(committed: Any, fresh: Any, where: str) -> list[str]:
    if isinstance(committed, dict) and isinstance(fresh, dict):
        out: list[str] = []
        for key in sorted(set(committed) | set(fresh)):
            here = f"{where}/{key}"
            if key not in fresh:
                out.append(f"{here}: in the committed catalog, absent from the installed scikit-learn")
            elif key not in committed:
                out.append(f"{here}: new in the installed scikit-learn, absent from the committed catalog")
            else:
                out.extend(_differences(committed[key], fresh[key], here))
        return out
    if isinstance(committed, list) and isinstance(fresh, list) and len(committed) == len(fresh):
        out = []
        for i, (left, right) in enumerate(zip(committed, fresh, strict=True)):
            label = left.get("name", i) if isinstance(left, dict) else i
            out.extend(_differences(left, right, f"{where}/{label}"))
        return out
    if committed != fresh:
        return [f"{where or '/'}: committed {committed!r}, installed scikit-learn gives {fresh!r}"]
    return []


def main() -> None:
    """Write the catalog and say where."""
    print(f"wrote {write_catalog()}")


if __name__ == "__main__":
    main()
