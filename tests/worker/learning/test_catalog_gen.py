"""The catalog: generated from the installed scikit-learn, readable without it, and drift-checked."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest
from sklearn.base import clone

from service.catalog import CATALOG_FILE, load_catalog, parse_catalog
from worker.learning.catalog_gen import (
    ESTIMATORS,
    TRANSFORMERS,
    build_catalog,
    catalog_drift,
    construct,
    estimator_class,
    render,
)

# The allow-list as the issue states it.
ISSUE_ESTIMATORS = {
    "LinearRegression", "Ridge", "Lasso", "ElasticNet", "SGDRegressor", "LogisticRegression", "SGDClassifier",
    "KNeighborsRegressor", "KNeighborsClassifier", "SVR", "SVC", "DecisionTreeRegressor", "DecisionTreeClassifier",
    "RandomForestRegressor", "RandomForestClassifier", "ExtraTreesRegressor", "ExtraTreesClassifier",
    "GradientBoostingRegressor", "GradientBoostingClassifier", "HistGradientBoostingRegressor",
    "HistGradientBoostingClassifier", "MLPRegressor", "MLPClassifier", "DummyRegressor", "DummyClassifier",
    # counts, amounts and quantiles; naive Bayes
    "PoissonRegressor", "GammaRegressor", "TweedieRegressor", "HuberRegressor", "QuantileRegressor", "GaussianNB",
}
ISSUE_TRANSFORMERS = {"StandardScaler", "MinMaxScaler", "RobustScaler", "OneHotEncoder", "OrdinalEncoder",
                      "SimpleImputer", "PolynomialFeatures", "KNNImputer", "IterativeImputer", "MissingIndicator",
                      "TargetEncoder", "SplineTransformer", "KBinsDiscretizer", "PCA"}


def test_committed_catalog_matches_installed_sklearn() -> None:
    drift = catalog_drift()
    assert drift == [], "regenerate with `python -m worker.learning.catalog_gen`:\n" + "\n".join(drift)


def test_drift_is_reported_when_a_default_changes(tmp_path: Path) -> None:
    document = json.loads(CATALOG_FILE.read_text(encoding="utf-8"))
    ridge = next(e for e in document["estimators"] if e["name"] == "Ridge")
    ridge["params"]["alpha"]["default"] = 2.0
    del ridge["params"]["tol"]
    edited = tmp_path / "estimators.json"
    edited.write_text(json.dumps(document), encoding="utf-8")
    drift = catalog_drift(edited)
    assert any("/estimators/Ridge/params/alpha/default" in d and "2.0" in d for d in drift), drift
    assert any("/estimators/Ridge/params/tol" in d and "new in the installed" in d for d in drift), drift


def test_generation_is_deterministic_across_hash_seeds() -> None:
    # StrOptions keeps its options in a set, whose order changes with PYTHONHASHSEED.
    outputs = {
        subprocess.run(
            [sys.executable, "-c", "import sys; from worker.learning.catalog_gen import build_catalog, render; "
             "sys.stdout.write(render(build_catalog()))"],
            env={"PYTHONHASHSEED": seed, "PATH": ""}, capture_output=True, text=True, check=True,
            cwd=Path(__file__).resolve().parents[3],
        ).stdout
        for seed in ("1", "2")
    }
    assert len(outputs) == 1
    assert outputs.pop() == render(build_catalog())


def test_allow_list_is_the_issues_list() -> None:
    assert set(ESTIMATORS) == ISSUE_ESTIMATORS
    assert set(TRANSFORMERS) == ISSUE_TRANSFORMERS
    catalog = load_catalog()
    boosting = {"LGBMRegressor", "LGBMClassifier", "XGBRegressor", "XGBClassifier"}
    listed = {e.name for e in catalog.entries.values() if e.kind == "estimator"}
    assert listed == ISSUE_ESTIMATORS | boosting | META_NAMES
    assert set(catalog.transformer_names()) == ISSUE_TRANSFORMERS


META_NAMES = {"CalibratedClassifierCV", "VotingClassifier", "VotingRegressor", "StackingClassifier",
              "StackingRegressor", "TransformedTargetRegressor"}


@pytest.mark.parametrize("name", sorted(META_NAMES))
def test_nesting_entries_describe_the_class(name: str) -> None:
    entry = load_catalog().entries[name]
    cls = estimator_class(name)
    assert set(entry.params) == set(construct(cls).get_params(deep=False))
    assert entry.nested and all(rule["form"] in ("one", "list") for rule in entry.nested.values())
    assert all(rule.get("max_members", 5) == 5 for rule in entry.nested.values())
    if "cv" in entry.params:
        assert entry.caps["cv"] == {"max": 10}
    if name == "TransformedTargetRegressor":
        assert dict(entry.target_functions) == {"log1p": "expm1", "sqrt": "square"}
        assert "transformer" in entry.withheld


@pytest.mark.parametrize("name", sorted(ISSUE_ESTIMATORS | ISSUE_TRANSFORMERS))
def test_entry_describes_the_class(name: str) -> None:
    entry = load_catalog().entries[name]
    cls = estimator_class(name)
    assert entry.module.startswith("sklearn.") and cls.__module__.startswith(entry.module)
    defaults = cls().get_params(deep=False)
    assert set(entry.params) == set(defaults)  # every constructor argument scikit-learn accepts
    for param, value in defaults.items():
        if isinstance(value, bool | str) or (isinstance(value, int | float) and math.isfinite(value)):
            assert entry.params[param]["default"] == value, param
        assert entry.params[param]["type"], param
    if "n_jobs" in defaults:
        # One core per fold job; a deprecated n_jobs (no effect, warns when set) stays at its default.
        deprecated = entry.params["n_jobs"].get("deprecated", False)
        assert entry.forced["n_jobs"] == (defaults["n_jobs"] if deprecated else 1)
    clone(cls())  # importable and constructible by the recorded name


def test_lookups_and_caps() -> None:
    catalog = load_catalog()
    ridge = catalog.estimator("Ridge")
    assert ridge is not None and ridge.task == "regression" and ridge.linear
    assert ridge.caps["max_iter"]["max"] == 10_000
    assert catalog.transformer("Ridge") is None and catalog.estimator("StandardScaler") is None
    assert catalog.estimator("os.system") is None
    forest = catalog.estimator("RandomForestClassifier")
    assert forest is not None and not forest.linear and forest.caps["n_estimators"]["max"] == 500
    mlp = catalog.estimator("MLPRegressor")
    assert mlp is not None and mlp.caps["hidden_layer_sizes"] == {"max_layers": 4, "max_total_units": 1024}
    assert "LogisticRegression" in catalog.estimator_names("classification")
    assert "Ridge" not in catalog.estimator_names("classification")
    assert catalog.estimator_task("SVC") == "classification" and catalog.estimator_task("nope") is None
    assert catalog.is_transformer("OneHotEncoder") and not catalog.is_transformer("SVC")
    assert set(catalog.caps_note) >= {"n_estimators", "max_iter", "hidden_layer_sizes", "max_depth"}


def test_loader_does_not_import_sklearn() -> None:
    code = ("import sys, service.catalog as c; cat = c.load_catalog(); assert cat.estimator('Ridge'); "
            "assert 'sklearn' not in sys.modules, sorted(m for m in sys.modules if 'sklearn' in m)")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).resolve().parents[3])


def test_to_document_is_a_copy() -> None:
    catalog = parse_catalog(json.loads(CATALOG_FILE.read_text(encoding="utf-8")))
    document = catalog.to_document()
    document["estimators"].clear()
    assert catalog.estimator("Ridge") is not None and catalog.to_document()["estimators"]
