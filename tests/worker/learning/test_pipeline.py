"""Pipelines from configuration documents: chains, pass-through, forced values, feature names."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn.compose import ColumnTransformer
from sklearn.datasets import load_diabetes
from sklearn.impute import SimpleImputer
from sklearn.linear_model import Ridge
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from service.submission.resolved import ResolvedModel
from worker.jobs import runtime
from worker.learning.pipeline import build_pipeline, fit_in_place, output_feature_names

NUMERIC = {"a": "numeric", "b": "numeric", "c": "numeric"}


def model_of(document: dict[str, Any]) -> ResolvedModel:
    """The model part of a configuration, from its stored document."""
    return ResolvedModel.from_document(document)


def test_steps_on_the_same_columns_chain_in_order() -> None:
    model = {"estimator": "Ridge", "features": ["a", "b", "c"], "params": {}, "preprocess": [
        {"transformer": "SimpleImputer", "columns": ["c", "a"]},
        {"transformer": "StandardScaler", "columns": ["c", "a"]},
    ]}
    pipeline = build_pipeline(model_of(model), NUMERIC)
    ct: ColumnTransformer = pipeline.named_steps["preprocess"]
    ((_name, chain, columns),) = ct.transformers
    assert isinstance(chain, Pipeline) and columns == [2, 0]  # numpy input: by position
    assert [type(s).__name__ for _, s in chain.steps] == ["SimpleImputer", "StandardScaler"]
    X = np.array([[1.0, 5.0, np.nan], [2.0, 6.0, 4.0], [3.0, 7.0, 8.0], [4.0, 9.0, 6.0]])
    pipeline.fit(X, [1.0, 2.0, 3.0, 4.0])
    # Reference: the same steps composed by hand with scikit-learn.
    expected = make_pipeline(SimpleImputer(), StandardScaler()).fit_transform(X[:, [2, 0]])
    np.testing.assert_allclose(ct.transform(X), np.column_stack([expected, X[:, 1]]))
    assert output_feature_names(pipeline, ["a", "b", "c"]) == ["c", "a", "b"]  # b passes through


def test_frames_select_columns_by_name() -> None:
    model = {"estimator": "Ridge", "features": ["depot", "a"], "params": {},
             "preprocess": [{"transformer": "OneHotEncoder", "columns": ["depot"]}]}
    pipeline = build_pipeline(model_of(model), {"depot": "categorical", "a": "numeric"})
    ((_n, _t, columns),) = pipeline.named_steps["preprocess"].transformers
    assert columns == ["depot"]
    frame = pd.DataFrame({"depot": ["n", "s", "n", "e"], "a": [1.0, 2.0, 3.0, 4.0]})
    pipeline.fit(frame, [1.0, 2.0, 3.0, 4.0])
    assert output_feature_names(pipeline, ["depot", "a"]) == ["depot_e", "depot_n", "depot_s", "a"]


def test_forced_and_service_defaults() -> None:
    forest = build_pipeline(model_of({"estimator": "RandomForestRegressor", "features": ["a"],
                                      "params": {"n_jobs": 8}}), {"a": "numeric"}).named_steps["model"]
    assert forest.n_jobs == 1 and forest.verbose == 0  # forced whatever the document says
    assert forest.random_state == 0  # service default: reproducible folds and refits
    seeded = build_pipeline(model_of({"estimator": "RandomForestRegressor", "features": ["a"],
                                      "params": {"random_state": 9}}), {"a": "numeric"}).named_steps["model"]
    assert seeded.random_state == 9


def test_numeric_input_without_steps_goes_straight_to_the_estimator() -> None:
    pipeline = build_pipeline(model_of({"estimator": "Ridge", "features": ["c", "a"], "params": {"alpha": 3.0}}),
                              NUMERIC)
    assert list(pipeline.named_steps) == ["model"]  # no pass-through ColumnTransformer copying the matrix
    X = np.array([[1.0, 5.0], [2.0, 6.0], [3.0, 8.0], [4.0, 9.0]])
    y = np.array([1.0, 2.0, 3.0, 5.0])
    pipeline.fit(X, y)
    # Reference: Ridge(alpha=3.0) fitted by scikit-learn on the same rows.
    np.testing.assert_allclose(pipeline.predict(X), Ridge(alpha=3.0).fit(X, y).predict(X))
    assert output_feature_names(pipeline, ["c", "a"]) == ["c", "a"]
    # A frame keeps its ColumnTransformer, steps or not: the estimator still sees a numpy matrix.
    framed = build_pipeline(model_of({"estimator": "Ridge", "features": ["d", "a"]}),
                            {"d": "categorical", "a": "numeric"})
    assert list(framed.named_steps) == ["preprocess", "model"]


def test_a_name_outside_the_catalog_is_a_callers_error() -> None:
    # The API rejects it at its pointer first (tests/service/submission/test_config.py).
    with pytest.raises(LookupError, match=r"'os\.system' is not in the catalog"):
        build_pipeline(model_of({"estimator": "os.system", "features": ["a"]}), {"a": "numeric"})
    with pytest.raises(LookupError, match="'Pickle' is not in the catalog"):
        build_pipeline(model_of({"estimator": "Ridge", "features": ["a"],
                                 "preprocess": [{"transformer": "Pickle", "columns": ["a"]}]}),
                       {"a": "numeric"})


def test_lasso_reference_value_from_the_documentation() -> None:
    # scikit-learn documentation of cross_val_score: Lasso() on diabetes X[:150], cv=3 ->
    # [0.3315057, 0.08022103, 0.03531816]. The catalog pipeline (no preprocessing) must agree.
    X, y = load_diabetes(return_X_y=True)
    pipeline = build_pipeline(model_of({"estimator": "Lasso", "features": [f"x{i}" for i in range(10)]}),
                              {f"x{i}": "numeric" for i in range(10)})
    np.testing.assert_allclose(cross_val_score(pipeline, X[:150], y[:150], cv=3),
                               [0.3315057, 0.08022103, 0.03531816], atol=1e-7)
    np.testing.assert_allclose(cross_val_score(Ridge(), X[:150], y[:150], cv=3),
                               cross_val_score(build_pipeline(model_of({"estimator": "Ridge",
                                                                        "features": [f"x{i}" for i in range(10)]}),
                                                              {f"x{i}": "numeric" for i in range(10)}),
                                               X[:150], y[:150], cv=3))


def test_runtime_context_must_be_installed() -> None:
    runtime.uninstall()
    with pytest.raises(RuntimeError, match="no worker context installed"):
        runtime.current()


def test_json_lists_become_tuples_where_sklearn_wants_them() -> None:
    model = {"estimator": "Ridge", "features": ["a", "b"], "preprocess": [
        {"transformer": "MinMaxScaler", "columns": ["a"], "params": {"feature_range": [-1, 1]}},
        {"transformer": "PolynomialFeatures", "columns": ["b"], "params": {"degree": [2, 3]}},
    ]}
    pipeline = build_pipeline(model_of(model), {"a": "numeric", "b": "numeric"})
    X = np.array([[0.0, 1.0], [5.0, 2.0], [10.0, 3.0]])
    pipeline.fit(X, [1.0, 2.0, 3.0])
    scaled = pipeline.named_steps["preprocess"].transform(X)
    np.testing.assert_allclose(scaled[:, 0], [-1.0, 0.0, 1.0])
    assert output_feature_names(pipeline, ["a", "b"]) == ["a", "1", "b^2", "b^3"]  # bias column included
    # OneHotEncoder's categories is a list of lists, and stays one.
    encoder = build_pipeline(model_of({"estimator": "Ridge", "features": ["d"], "preprocess": [
        {"transformer": "OneHotEncoder", "columns": ["d"], "params": {"categories": [["x", "y"]]}}]}),
        {"d": "categorical"}).named_steps["preprocess"].transformers[0][1]
    assert encoder.categories == [["x", "y"]]


def test_iris_linear_svc_reference_value() -> None:
    # scikit-learn user guide, "Cross-validation: evaluating estimator performance": iris,
    # SVC(kernel="linear", C=1), cross_val_score(cv=5) -> "0.98 accuracy with a standard deviation of 0.02".
    from sklearn.datasets import load_iris

    X, y = load_iris(return_X_y=True)
    pipeline = build_pipeline(model_of({"estimator": "SVC", "features": [f"x{i}" for i in range(4)],
                                        "params": {"kernel": "linear", "C": 1}}),
                              {f"x{i}": "numeric" for i in range(4)})
    scores = cross_val_score(pipeline, X, y, cv=5)
    assert round(scores.mean(), 2) == 0.98 and round(scores.std(), 2) == 0.02


@pytest.mark.parametrize("estimator", ["LinearRegression", "Ridge", "Lasso", "ElasticNet"])
@pytest.mark.parametrize("steps", [[], [{"transformer": "StandardScaler", "columns": ["bmi", "bp", "s5"]}]],
                         ids=["bare", "scaled"])
@pytest.mark.parametrize("writeable", [False, True], ids=["read-only", "private"])
def test_a_fit_in_place_gives_the_same_model_to_the_last_bit(
    estimator: str, steps: list[dict[str, object]], writeable: bool
) -> None:
    # Reference: the same pipeline with scikit-learn's default copy_X=True, on diabetes (Efron et al.
    # 2004, bundled with scikit-learn; unscaled, so centring changes every value) held in a read-only
    # array as the memory map is, or in a private writeable copy as the holdout refit's rows are.
    frame = load_diabetes(as_frame=True, scaled=False).frame
    features = ["age", "bmi", "bp", "s5"]
    X, y = np.array(frame[features], dtype=np.float64), frame["target"].to_numpy()
    X.flags.writeable = writeable
    kinds = dict.fromkeys(features, "numeric")
    doc = model_of({"estimator": estimator, "features": features, "params": {}, "preprocess": steps})
    copying = build_pipeline(doc, kinds).fit(X, y)
    in_place = fit_in_place(build_pipeline(doc, kinds), doc)
    assert in_place.named_steps["model"].get_params()["copy_X"] is False
    in_place.fit(X, y)
    np.testing.assert_array_equal(in_place.named_steps["model"].coef_, copying.named_steps["model"].coef_)
    assert in_place.named_steps["model"].intercept_ == copying.named_steps["model"].intercept_
    # A private input reaching the estimator itself is centred in place (Lasso and ElasticNet copy
    # it to Fortran order first); a read-only one is copied by scikit-learn's validation.
    overwritten = writeable and not steps and estimator in ("LinearRegression", "Ridge")
    assert np.array_equal(X, frame[features].to_numpy()) is not overwritten


def test_fit_in_place_respects_a_chosen_copy_x_and_models_without_one() -> None:
    chosen = model_of({"estimator": "Ridge", "features": ["a"], "params": {"copy_X": True}, "preprocess": []})
    assert fit_in_place(build_pipeline(chosen, {"a": "numeric"}), chosen).named_steps["model"].copy_X is True
    tree = model_of({"estimator": "DecisionTreeRegressor", "features": ["a"], "params": {}, "preprocess": []})
    assert "copy_X" not in fit_in_place(build_pipeline(tree, {"a": "numeric"}), tree).named_steps["model"].get_params()
