"""LightGBM and XGBoost in the catalog: parameters from their own signatures, checked without the libraries."""

from __future__ import annotations

import json
from typing import Any

import lightgbm
import numpy as np
import pytest
import xgboost
from sklearn.datasets import load_diabetes

from service.catalog import load_catalog
from service.catalog.constraints import accepts, problem
from worker.learning.boosting_params import XGBOOST_LIBRARY_DEFAULTS
from worker.learning.catalog_gen import BOOSTING, estimator_class
from worker.learning.pipeline import make_instance


@pytest.mark.parametrize("name", sorted(BOOSTING))
def test_entry_lists_every_signature_parameter(name: str) -> None:
    entry = load_catalog().estimator(name)
    assert entry is not None and entry.native_categorical and not entry.linear
    signature = set(estimator_class(name)().get_params(deep=False))
    # Every constructor argument is either described (with a constraint) or withheld with a reason.
    assert signature <= set(entry.params) | set(entry.withheld)
    assert set(entry.params) == set(entry.constraints)
    assert entry.forced["n_jobs"] == 1 and entry.service_defaults == {"random_state": 0}
    assert entry.caps["n_estimators"]["max"] == 500
    instance = make_instance(entry, {"n_jobs": 8})
    assert instance.get_params()["n_jobs"] == 1 and instance.get_params()["random_state"] == 0


def test_xgboost_library_defaults_are_what_the_booster_reports() -> None:
    # Reference: the configuration a booster fitted with every default saves (xgboost's save_config).
    X, y = load_diabetes(return_X_y=True)
    config = json.loads(xgboost.XGBRegressor(n_jobs=1).fit(X[:50], y[:50]).get_booster().save_config())
    learner = config["learner"]
    flat = {**learner["gradient_booster"]["tree_train_param"], **learner["learner_train_param"],
            **learner["generic_param"]}
    aliases = {"learning_rate": "eta", "gamma": "min_split_loss", "reg_alpha": "alpha", "reg_lambda": "lambda"}
    for param, value in XGBOOST_LIBRARY_DEFAULTS.items():
        if param == "n_estimators":
            continue  # not a booster setting: the number of rounds fit runs
        saved = flat[aliases.get(param, param)]
        assert (float(saved) == pytest.approx(value)) if isinstance(value, int | float) else saved == value, param


def test_lightgbm_defaults_are_its_signatures() -> None:
    entry = load_catalog().estimator("LGBMRegressor")
    assert entry is not None
    for param, value in lightgbm.LGBMRegressor().get_params().items():
        assert entry.params[param]["default"] == value, param


@pytest.mark.parametrize(("name", "param", "good", "bad"), [
    # Ranges from LightGBM's Parameters page: "1 < num_leaves <= 131072", "learning_rate > 0.0",
    # "0.0 < bagging_fraction <= 1.0"; from XGBoost's: eta in [0, 1], subsample in (0, 1].
    ("LGBMRegressor", "num_leaves", [2, 131072], [1, 131073, 2.5, True, "31"]),
    ("LGBMRegressor", "learning_rate", [0.01, 3], [0.0, -0.1, None]),
    ("LGBMRegressor", "subsample", [1.0, 0.5], [0.0, 1.5]),
    ("LGBMRegressor", "objective", ["poisson", None], ["binary", "reg:squarederror"]),
    ("LGBMClassifier", "objective", ["multiclass", None], ["poisson"]),
    ("XGBRegressor", "learning_rate", [0.0, 1.0, None], [1.5, -0.1]),
    ("XGBRegressor", "subsample", [1.0, 0.1], [0.0]),
    ("XGBClassifier", "objective", ["multi:softprob"], ["reg:squarederror", "multi:softmax"]),
])
def test_constraints_from_the_documentation(name: str, param: str, good: list[Any], bad: list[Any]) -> None:
    entry = load_catalog().estimator(name)
    assert entry is not None
    constraint = entry.constraints[param]
    for value in good:
        assert problem(name, param, constraint, value) is None, value
    for value in bad:
        said = problem(name, param, constraint, value)
        assert said is not None and said.startswith(f"The {param!r} parameter of {name} must be "), value


def test_the_libraries_themselves_fail_where_the_catalog_refuses() -> None:
    # The constraint is no stricter than the library: LightGBM refuses num_leaves=1 at fit.
    X, y = load_diabetes(return_X_y=True)
    with pytest.raises(lightgbm.basic.LightGBMError):
        lightgbm.LGBMRegressor(num_leaves=1, verbose=-1, n_jobs=1).fit(X, y)
    assert not any(accepts(a, 1) for a in load_catalog().estimator("LGBMRegressor").constraints["num_leaves"])
    assert np.isfinite(lightgbm.LGBMRegressor(num_leaves=2, verbose=-1, n_jobs=1, n_estimators=2).fit(X, y)
                       .predict(X[:1])).all()
