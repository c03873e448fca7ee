"""Generate ``service/catalog/estimators.json``, the allow-list of estimators and transformers.

Run ``python -m worker.learning.catalog_gen`` after changing the allow-list or upgrading scikit-learn. The
API process reads the JSON without importing scikit-learn; ``catalog_drift`` lets a test fail when
the committed file no longer describes the installed scikit-learn.
"""

from __future__ import annotations

import importlib
import inspect
import json
from pathlib import Path
from typing import Any

import lightgbm
import sklearn
import xgboost
from sklearn.base import BaseEstimator, is_classifier, is_regressor
from sklearn.experimental import enable_iterative_imputer  # noqa: F401  (IterativeImputer is experimental)

from service.catalog.constraints import describe as describe_constraint
from worker.learning import boosting_params as bp
from worker.learning.catalog_render import describe, differences, json_value

CATALOG_PATH = Path(__file__).resolve().parents[2] / "service" / "catalog" / "estimators.json"

ESTIMATORS: tuple[str, ...] = (
    "LinearRegression", "Ridge", "Lasso", "ElasticNet", "SGDRegressor", "LogisticRegression", "SGDClassifier",
    "KNeighborsRegressor", "KNeighborsClassifier", "SVR", "SVC", "DecisionTreeRegressor",
    "DecisionTreeClassifier", "RandomForestRegressor", "RandomForestClassifier", "ExtraTreesRegressor",
    "ExtraTreesClassifier", "GradientBoostingRegressor", "GradientBoostingClassifier",
    "HistGradientBoostingRegressor", "HistGradientBoostingClassifier", "MLPRegressor", "MLPClassifier",
    "DummyRegressor", "DummyClassifier", "PoissonRegressor", "GammaRegressor", "TweedieRegressor",
    "HuberRegressor", "QuantileRegressor", "GaussianNB",
)
TRANSFORMERS: tuple[str, ...] = (
    "StandardScaler", "MinMaxScaler", "RobustScaler", "OneHotEncoder", "OrdinalEncoder", "SimpleImputer",
    "PolynomialFeatures", "KNNImputer", "IterativeImputer", "MissingIndicator", "TargetEncoder",
    "SplineTransformer", "KBinsDiscretizer", "PCA",
)
# The gradient-boosting libraries' scikit-learn classes: name -> (library, module the service imports, task).
# XGBClassifier is the service's subclass that fits on the dataset's own labels (worker.learning.boosting).
BOOSTING: dict[str, tuple[str, str, str]] = {
    "LGBMRegressor": ("lightgbm", "lightgbm", "regression"),
    "LGBMClassifier": ("lightgbm", "lightgbm", "classification"),
    "XGBRegressor": ("xgboost", "xgboost", "regression"),
    "XGBClassifier": ("xgboost", "worker.learning.boosting", "classification"),
}
# Estimators built around other catalog estimators, declared as nested {"estimator": name, "params": {...}}
# objects: which parameters hold them ("one" estimator, or a "list" of named members) and the module.
# A member is a plain catalog estimator of the same task: no ensemble inside an ensemble.
META: dict[str, tuple[str, dict[str, str]]] = {
    "CalibratedClassifierCV": ("sklearn.calibration", {"estimator": "one"}),
    "VotingClassifier": ("sklearn.ensemble", {"estimators": "list"}),
    "VotingRegressor": ("sklearn.ensemble", {"estimators": "list"}),
    "StackingClassifier": ("sklearn.ensemble", {"estimators": "list", "final_estimator": "one"}),
    "StackingRegressor": ("sklearn.ensemble", {"estimators": "list", "final_estimator": "one"}),
    "TransformedTargetRegressor": ("sklearn.compose", {"regressor": "one"}),
}
_MAX_MEMBERS = 5
# TransformedTargetRegressor's func, by name, and the inverse_func that goes with it.
TARGET_FUNCTIONS: dict[str, str] = {"log1p": "expm1", "sqrt": "square"}
# Estimators that take categorical columns as they are, declared in model.categorical_features.
NATIVE_CATEGORICAL: frozenset[str] = frozenset({
    "HistGradientBoostingRegressor", "HistGradientBoostingClassifier", *BOOSTING,
})
_PUBLIC_MODULES: tuple[str, ...] = (
    "sklearn.linear_model", "sklearn.neighbors", "sklearn.svm", "sklearn.tree", "sklearn.ensemble",
    "sklearn.neural_network", "sklearn.dummy", "sklearn.preprocessing", "sklearn.impute", "sklearn.naive_bayes",
    "sklearn.decomposition",
)
# Fitted models that expose ``coef_`` whatever their parameters; their coefficients are recorded per fold.
_LINEAR: frozenset[str] = frozenset({
    "LinearRegression", "Ridge", "Lasso", "ElasticNet", "SGDRegressor", "LogisticRegression", "SGDClassifier",
    "PoissonRegressor", "GammaRegressor", "TweedieRegressor", "HuberRegressor", "QuantileRegressor",
})
# Values scikit-learn's constraints still list that cannot work here, narrowed to those that do, with the reason.
_RESTRICTED: dict[str, dict[str, dict[str, Any]]] = {
    "QuantileRegressor": {"solver": {"values": ["highs", "highs-ds", "highs-ipm"],
                                     "why": "scipy 1.11 removed the 'interior-point' and 'revised simplex' solvers"}},
}
_WITHHELD: dict[str, dict[str, str]] = {
    "IterativeImputer": {"estimator": "an estimator object is not expressible in JSON; the default "
                                      "BayesianRidge is used"},
}
# Caps on what sizes a transformer's memory or time, by class: {class: {param: {"max": n}}}.
_TRANSFORMER_CAPS: dict[str, dict[str, dict[str, int]]] = {
    "KNNImputer": {"n_neighbors": {"max": 100}},
    "IterativeImputer": {"max_iter": {"max": 100}},
    "SplineTransformer": {"n_knots": {"max": 100}, "degree": {"max": 5}},
    "KBinsDiscretizer": {"n_bins": {"max": 256}},
    "PCA": {"n_components": {"max": 1000}, "iterated_power": {"max": 100}},
    "TargetEncoder": {"cv": {"max": 10}},
}
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
    "n_neighbors": f"at most {_NEIGHBOURS_CAP} neighbours (KNNImputer: at most 100)",
    "max_fun": f"at most {_FUNCTION_CALLS_CAP} loss function calls",
    "dtype": f"a numeric type of at most {_DTYPE_ITEMSIZE_CAP} bytes per value (e.g. 'float64', 'float32', "
             "'int64'); string and object types are refused",
    "value_caps": f"every parameter value: strings of at most {VALUE_CAPS['max_string_length']} characters, "
                  f"lists of at most {VALUE_CAPS['max_list_items']} items (nested lists count their own items)",
    "n_knots": "SplineTransformer: at most 100 knots and degree at most 5",
    "n_bins": "KBinsDiscretizer: at most 256 bins per column",
    "n_components": "PCA: at most 1000 components (a fraction of the variance stays allowed); iterated_power at "
                    "most 100",
    "cv": "TargetEncoder: at most 10 internal folds",
    "imputer_max_iter": "IterativeImputer: at most 100 rounds of imputation",
    "forced": "parameters the service fixes (n_jobs=1: one core per fold job; verbose off: worker logs "
              "stay free of fitting chatter); a different value is rejected",
    "service_defaults": "defaults the service uses instead of scikit-learn's (random_state=0 so every "
                        "fold and the holdout refit are reproducible); a submission may override them",
    "num_leaves": "LightGBM: at most 1024 leaves per tree",
    "max_leaves": "XGBoost: at most 1024 leaves per tree (0, no limit, stays allowed: max_depth bounds it)",
    "max_bin": "XGBoost: at most 1024 histogram bins per feature",
    "boosting_depth": "LightGBM max_depth at most 64 (-1, no limit, stays allowed: num_leaves bounds the tree); "
                      "XGBoost max_depth between 1 and 16 (0, no limit, is refused)",
    "boosting_threads": "LightGBM and XGBoost fit on one thread (n_jobs=1) and keep quiet (LightGBM verbose=-1, "
                        "XGBoost verbosity=0); XGBoost runs on the CPU (device='cpu')",
    "withheld": "parameters a library has that a submission may not set; each entry says why",
    "restricted": "parameters whose accepted values the service narrows to those that work with its libraries; "
                  "each entry says why",
    "nested": f"ensembles, calibration and target transformation take catalog estimators of their own task as "
              f"nested {{\"estimator\": name, \"params\": {{...}}}} objects (list members also take a \"name\"); "
              f"at most {_MAX_MEMBERS} members, and no ensemble or other nesting estimator inside one",
    "target_functions": "TransformedTargetRegressor: func is 'log1p' (inverse_func 'expm1') or 'sqrt' "
                        "(inverse_func 'square'), by name; inverse_func may be left out",
    "constraints": "LightGBM and XGBoost do not validate their parameters as scikit-learn does: their entries "
                   "carry constraints written from the libraries' documentation, checked before any fit",
}


def build_catalog() -> dict[str, Any]:
    """Describe every allow-listed class as the installed scikit-learn defines it."""
    return {
        "generated_by": "python -m worker.learning.catalog_gen",
        "sklearn_version": sklearn.__version__,
        "caps_note": CAPS_NOTE,
        "value_caps": VALUE_CAPS,
        "library_versions": {"lightgbm": lightgbm.__version__, "xgboost": xgboost.__version__},
        "estimators": sorted([*(_entry(name, "estimator") for name in [*ESTIMATORS, *META]),
                              *(_boosting_entry(name) for name in BOOSTING)], key=lambda e: str(e["name"])),
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
    for informational in ("sklearn_version", "library_versions"):
        committed.pop(informational, None)
        fresh.pop(informational, None)
    return differences(committed, fresh, "")


def estimator_class(name: str) -> type[BaseEstimator]:
    """Import an allow-listed class by name from its public scikit-learn module."""
    if name in BOOSTING or name in META:
        module = BOOSTING[name][1] if name in BOOSTING else META[name][0]
        cls: type[BaseEstimator] = getattr(importlib.import_module(module), name)
        return cls
    if name not in ESTIMATORS and name not in TRANSFORMERS:
        raise KeyError(f"{name!r} is not in the catalog allow-list")
    return _find_class(name)[1]


def _find_class(name: str) -> tuple[str, type[BaseEstimator]]:
    for module_name in _PUBLIC_MODULES:
        cls = getattr(importlib.import_module(module_name), name, None)
        if inspect.isclass(cls):
            return module_name, cls
    raise KeyError(f"{name!r} is not found in any of {', '.join(_PUBLIC_MODULES)}")


def construct(cls: type[BaseEstimator]) -> BaseEstimator:
    """Instantiate a catalog class with its defaults (ensembles require a member list: an empty one)."""
    return cls(estimators=[]) if cls.__name__ in META and "estimators" in META[cls.__name__][1] else cls()


def _entry(name: str, kind: str) -> dict[str, Any]:
    module_name, cls = (META[name][0], estimator_class(name)) if name in META else _find_class(name)
    instance = construct(cls)
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
    if name == "TargetEncoder":
        # Its cross fitting shuffles with an unseeded generator unless given a seed; random_state is
        # deprecated in favour of a splitter object, which JSON cannot carry, so the seed it is.
        service_defaults["random_state"] = 0
    entry: dict[str, Any] = {
        "name": name,
        "kind": kind,
        "module": module_name,
        "params": {
            param: {"default": json_value(value), "type": describe(constraints.get(param)),
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
        entry["native_categorical"] = name in NATIVE_CATEGORICAL
    if name.startswith("HistGradientBoosting"):
        entry["withheld"] = dict(bp.HIST_GRADIENT_BOOSTING_WITHHELD)
    if name in _WITHHELD:
        entry["withheld"] = dict(_WITHHELD[name])
    if name in _RESTRICTED:
        entry["restricted"] = _RESTRICTED[name]
    if name in META:
        entry["nested"] = {param: {"form": form, **({"max_members": _MAX_MEMBERS} if form == "list" else {})}
                           for param, form in META[name][1].items()}
    if name == "TransformedTargetRegressor":
        entry["target_functions"] = dict(TARGET_FUNCTIONS)
        entry["withheld"] = {"transformer": "a transformer object is not expressible in JSON; name func "
                                            "(and inverse_func) instead"}
    return entry


def _boosting_entry(name: str) -> dict[str, Any]:
    """Describe a LightGBM or XGBoost class: defaults from its signature, constraints from its documentation."""
    library, module_name, task = BOOSTING[name]
    cls = estimator_class(name)
    instance = cls()
    defaults = instance.get_params(deep=False)
    if library == "lightgbm":
        defaults.update(bp.LIGHTGBM_EXTRA_DEFAULTS)
    constraints = bp.constraints_for(library, task)
    withheld = bp.XGBOOST_WITHHELD if library == "xgboost" else {}
    unknown = set(defaults) - set(constraints) - set(withheld)
    assert not unknown, f"{name}: describe {sorted(unknown)} in worker/learning/boosting_params.py"
    params: dict[str, Any] = {}
    for param in sorted(set(defaults) - set(withheld)):
        described: dict[str, Any] = {"default": json_value(defaults[param]),
                                     "type": describe_constraint(constraints[param])}
        if defaults[param] is None and library == "xgboost" and param in bp.XGBOOST_LIBRARY_DEFAULTS:
            described["library_default"] = bp.XGBOOST_LIBRARY_DEFAULTS[param]
        params[param] = described
    assert is_classifier(instance) == (task == "classification"), name
    return {
        "name": name,
        "kind": "estimator",
        "module": module_name,
        "library": library,
        "params": params,
        "constraints": {param: constraints[param] for param in sorted(params)},
        "withheld": dict(sorted(withheld.items())),
        "forced": dict(bp.BOOSTING_FORCED[library]),
        "service_defaults": {"random_state": 0},
        "caps": bp.BOOSTING_CAPS[library],
        "task": task,
        "linear": False,
        "has_predict_proba_by_default": task == "classification",
        "native_categorical": True,
    }


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
    caps.update(_TRANSFORMER_CAPS.get(name, {}))
    if name in META and "cv" in defaults:
        caps["cv"] = {"max": 10}
    return caps


def main() -> None:
    """Write the catalog and say where."""
    print(f"wrote {write_catalog()}")


if __name__ == "__main__":
    main()
