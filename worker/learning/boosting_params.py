"""The parameters of LightGBM's and XGBoost's scikit-learn classes, described for the catalog.

Neither library validates its constructor arguments the way scikit-learn does (``_parameter_constraints``),
so the catalog carries a description of each one here, written from the library's own signature and
documentation (LightGBM 4.x "Parameters" page and ``LGBMModel`` docstring; XGBoost 3.x "XGBoost
Parameters" page and ``XGBModel`` docstring). ``service.catalog.constraints`` checks submitted values
against it, in the worker's check job and without importing either library.

A constraint is a list of alternatives, each a JSON object:
``{"type": "int"|"float", "min": x, "max": y, "closed": "both"|"left"|"right"|"neither"}``,
``{"type": "options", "values": [...]}``, ``{"type": "none"}``, ``{"type": "bool"}``, ``{"type": "dict"}``.

``library_default`` is what a ``None`` in XGBoost's signature stands for: the values the booster's saved
configuration reports after a fit with the defaults (``get_booster().save_config()``, xgboost 3.2);
``tests/worker/learning/test_boosting.py`` reads them back from the installed library.
"""

from __future__ import annotations

from typing import Any

Constraint = list[dict[str, Any]]

_NONE: dict[str, Any] = {"type": "none"}
_BOOL: dict[str, Any] = {"type": "bool"}


def _int(low: float | None = None, high: float | None = None, closed: str = "both") -> dict[str, Any]:
    return {"type": "int", "min": low, "max": high, "closed": closed}


def _float(low: float | None = None, high: float | None = None, closed: str = "both") -> dict[str, Any]:
    return {"type": "float", "min": low, "max": high, "closed": closed}


def _options(*values: Any) -> dict[str, Any]:
    return {"type": "options", "values": list(values)}


# A seed as both libraries take it from JSON: LightGBM passes it to a C int.
_SEED: Constraint = [_int(0, 2**31 - 1), _NONE]
_FRACTION: Constraint = [_float(0.0, 1.0, "right")]  # (0, 1]
_NON_NEGATIVE: Constraint = [_float(0.0, None)]

LIGHTGBM_COMMON: dict[str, Constraint] = {
    "boosting_type": [_options("gbdt", "dart", "rf")],
    "num_leaves": [_int(1, 131072, "right")],  # "1 < num_leaves <= 131072"
    "max_depth": [_int()],  # "<= 0 means no limit"
    "learning_rate": [_float(0.0, None, "neither")],  # "learning_rate > 0.0"
    "n_estimators": [_int(0, None)],  # num_iterations >= 0
    "subsample_for_bin": [_int(0, None, "neither")],  # bin_construct_sample_cnt > 0
    "class_weight": [{"type": "dict"}, _options("balanced"), _NONE],
    "min_split_gain": _NON_NEGATIVE,  # min_gain_to_split >= 0.0
    "min_child_weight": _NON_NEGATIVE,  # min_sum_hessian_in_leaf >= 0.0
    "min_child_samples": [_int(0, None)],  # min_data_in_leaf >= 0
    "subsample": _FRACTION,  # 0.0 < bagging_fraction <= 1.0
    "subsample_freq": [_int(0, None)],  # bagging_freq, 0 disables bagging
    "colsample_bytree": _FRACTION,  # 0.0 < feature_fraction <= 1.0
    "reg_alpha": _NON_NEGATIVE,  # lambda_l1 >= 0.0
    "reg_lambda": _NON_NEGATIVE,  # lambda_l2 >= 0.0
    "random_state": _SEED,
    "n_jobs": [_int(), _NONE],
    "importance_type": [_options("split", "gain")],
    "verbose": [_int()],  # verbosity: < 0 fatal only, 0 warnings, 1 info, > 1 debug
}
LIGHTGBM_OBJECTIVES: dict[str, Constraint] = {
    "regression": [_options("regression", "regression_l1", "huber", "fair", "poisson", "quantile", "mape",
                            "gamma", "tweedie"), _NONE],
    "classification": [_options("binary", "multiclass", "multiclassova"), _NONE],
}

XGBOOST_COMMON: dict[str, Constraint] = {
    "n_estimators": [_int(1, None), _NONE],
    "max_depth": [_int(0, None), _NONE],  # 0: no limit (lossguide growth only)
    "max_leaves": [_int(0, None), _NONE],  # 0: no limit
    "max_bin": [_int(2, None), _NONE],
    "grow_policy": [_options("depthwise", "lossguide"), _NONE],
    "learning_rate": [_float(0.0, 1.0), _NONE],  # eta, range [0, 1]
    "verbosity": [_int(0, 3), _NONE],
    "booster": [_options("gbtree", "dart"), _NONE],  # gblinear grows no trees: not offered
    "tree_method": [_options("hist", "approx", "exact"), _NONE],
    "n_jobs": [_int(), _NONE],
    "gamma": [_float(0.0, None), _NONE],  # min_split_loss, range [0, inf]
    "min_child_weight": [_float(0.0, None), _NONE],
    "max_delta_step": [_float(0.0, None), _NONE],
    "subsample": [_float(0.0, 1.0, "right"), _NONE],  # range (0, 1]
    "sampling_method": [_options("uniform"), _NONE],  # gradient_based is for GPUs only
    "colsample_bytree": [_float(0.0, 1.0, "right"), _NONE],
    "colsample_bylevel": [_float(0.0, 1.0, "right"), _NONE],
    "colsample_bynode": [_float(0.0, 1.0, "right"), _NONE],
    "reg_alpha": [_float(0.0, None), _NONE],
    "reg_lambda": [_float(0.0, None), _NONE],
    "scale_pos_weight": [_float(0.0, None), _NONE],
    "base_score": [_float(), _NONE],
    "random_state": _SEED,
    "importance_type": [_options("gain", "weight", "cover", "total_gain", "total_cover"), _NONE],
    "device": [_options("cpu"), _NONE],
    "validate_parameters": [_BOOL, _NONE],
    "max_cat_to_onehot": [_int(1, None), _NONE],
    "max_cat_threshold": [_int(1, None, "both"), _NONE],
    "multi_strategy": [_options("one_output_per_tree", "multi_output_tree"), _NONE],
}
XGBOOST_OBJECTIVES: dict[str, Constraint] = {
    "regression": [_options("reg:squarederror", "reg:squaredlogerror", "reg:pseudohubererror",
                            "reg:absoluteerror", "reg:quantileerror", "count:poisson", "reg:gamma",
                            "reg:tweedie"), _NONE],
    "classification": [_options("binary:logistic", "multi:softprob"), _NONE],
}
XGBOOST_LIBRARY_DEFAULTS: dict[str, Any] = {
    "n_estimators": 100, "max_depth": 6, "max_leaves": 0, "max_bin": 256, "grow_policy": "depthwise",
    "learning_rate": 0.3, "booster": "gbtree", "gamma": 0.0, "min_child_weight": 1.0, "max_delta_step": 0.0,
    "subsample": 1.0, "sampling_method": "uniform", "colsample_bytree": 1.0, "colsample_bylevel": 1.0,
    "colsample_bynode": 1.0, "reg_alpha": 0.0, "reg_lambda": 1.0, "max_cat_to_onehot": 4,
    "max_cat_threshold": 64, "multi_strategy": "one_output_per_tree", "device": "cpu",
}
# Parameters the libraries have that a submission may not set, and why.
XGBOOST_WITHHELD: dict[str, str] = {
    "callbacks": "callbacks are code; configurations are declarative",
    "early_stopping_rounds": "early stopping needs an evaluation set, which a fold job does not pass",
    "eval_metric": "evaluation metrics apply to an evaluation set, which a fold job does not pass",
    "missing": "missing values are NaN, as the service reads them (JSON has no NaN)",
    "enable_categorical": "set by the service when model.categorical_features declares native categorical "
                          "columns",
    "feature_types": "set by the service from model.categorical_features; types by column position are not "
                     "accepted",
    "feature_weights": "per-column weights by position are not accepted",
    "monotone_constraints": "constraints by column position are not accepted",
    "interaction_constraints": "constraints by column position are not accepted",
    "num_parallel_tree": "kept at 1 so n_estimators counts every tree and the tree cap holds",
}
HIST_GRADIENT_BOOSTING_WITHHELD: dict[str, str] = {
    "categorical_features": "declare native categorical columns by name in model.categorical_features; the "
                            "service encodes them and passes their names",
}

# The caps the service puts on what sizes a boosting job: trees, leaves per tree, depth, histogram bins.
BOOSTING_CAPS: dict[str, dict[str, dict[str, int]]] = {
    "lightgbm": {"n_estimators": {"max": 500}, "num_leaves": {"max": 1024}, "max_depth": {"max": 64}},
    "xgboost": {"n_estimators": {"max": 500}, "max_depth": {"min": 1, "max": 16}, "max_leaves": {"max": 1024},
                "max_bin": {"max": 1024}},
}
BOOSTING_FORCED: dict[str, dict[str, Any]] = {
    "lightgbm": {"n_jobs": 1, "verbose": -1},
    "xgboost": {"n_jobs": 1, "verbosity": 0, "device": "cpu"},
}
# LightGBM's documented default verbosity; the service keeps its logs quiet (forced -1).
LIGHTGBM_EXTRA_DEFAULTS: dict[str, Any] = {"verbose": 1}


def constraints_for(library: str, task: str) -> dict[str, Constraint]:
    """Every settable parameter of one library's class for ``task``, with its constraint."""
    if library == "lightgbm":
        return {**LIGHTGBM_COMMON, "objective": LIGHTGBM_OBJECTIVES[task]}
    return {**XGBOOST_COMMON, "objective": XGBOOST_OBJECTIVES[task]}
