"""check_config: scikit-learn's own parameter validation at JSON pointers, plus the service caps."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import QuantileRegressor, Ridge
from sklearn.utils._param_validation import InvalidParameterError

from tests.support.worker_records import add_dataset, config_document
from worker import jobs
from worker.jobs import trial_fit
from worker.jobs.runtime import WorkerContext


@pytest.fixture
def diabetes(ctx: WorkerContext) -> dict[str, Any]:
    frame = load_diabetes(as_frame=True).frame
    return add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")


@pytest.fixture
def cancer(ctx: WorkerContext) -> dict[str, Any]:
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    return add_dataset(ctx, frame.iloc[:500], frame.iloc[500:], "target", "classification", scheme="stratified")


def check(dataset: dict[str, Any], estimator: str, **kwargs: Any) -> dict[str, Any]:
    return jobs.check_config(config_document(dataset, estimator, **kwargs), dataset["id"])


def pointers(answer: dict[str, Any]) -> dict[str, str]:
    assert answer["ok"] is False, answer
    return {p["pointer"]: p["detail"] for p in answer["problems"]}


def test_valid_configuration(diabetes: dict[str, Any]) -> None:
    answer = check(diabetes, "Ridge", params={"alpha": 0.5})
    assert answer == {"ok": True, "has_proba": False}  # linear comes from the catalog, in the API


def test_bad_value_is_rejected_in_sklearns_words(diabetes: dict[str, Any]) -> None:
    # What scikit-learn itself says about Ridge(alpha=-1):
    with pytest.raises(InvalidParameterError) as sklearn_says:
        Ridge(alpha=-1.0).fit([[0.0], [1.0]], [0.0, 1.0])
    found = pointers(check(diabetes, "Ridge", params={"alpha": -1.0}))
    assert list(found) == ["/model/params/alpha"]
    assert found["/model/params/alpha"] == str(sklearn_says.value)
    assert "'alpha' parameter of Ridge" in found["/model/params/alpha"] and "Got -1.0" in found["/model/params/alpha"]


def test_every_bad_parameter_is_named(diabetes: dict[str, Any]) -> None:
    found = pointers(check(diabetes, "Ridge", params={"alpha": -1.0, "solver": "magic", "alpah": 1.0,
                                                      "fit_intercept": True}))
    assert set(found) == {"/model/params/alpha", "/model/params/solver", "/model/params/alpah"}
    assert "'solver' parameter of Ridge" in found["/model/params/solver"]
    # Unknown names list what is accepted.
    assert "no parameter 'alpah'" in found["/model/params/alpah"]
    assert "accepted: alpha, copy_X, fit_intercept" in found["/model/params/alpah"]


def test_forced_n_jobs_cannot_be_changed(diabetes: dict[str, Any]) -> None:
    found = pointers(check(diabetes, "RandomForestRegressor", params={"n_jobs": 4}))
    assert "fixed to 1" in found["/model/params/n_jobs"] and "got 4" in found["/model/params/n_jobs"]
    assert check(diabetes, "RandomForestRegressor", params={"n_jobs": 1})["ok"] is True


@pytest.mark.parametrize(("estimator", "params", "pointer", "words"), [
    ("RandomForestRegressor", {"n_estimators": 501}, "/model/params/n_estimators", "at most 500"),
    ("GradientBoostingRegressor", {"n_estimators": 10_000}, "/model/params/n_estimators", "at most 500"),
    ("Lasso", {"max_iter": 10_001}, "/model/params/max_iter", "at most 10000"),
    ("HistGradientBoostingRegressor", {"max_iter": 501}, "/model/params/max_iter", "at most 500"),
    ("DecisionTreeRegressor", {"max_depth": 65}, "/model/params/max_depth", "at most 64"),
    ("MLPRegressor", {"hidden_layer_sizes": [600, 600]}, "/model/params/hidden_layer_sizes", "1024 units"),
    ("MLPRegressor", {"hidden_layer_sizes": [8, 8, 8, 8, 8]}, "/model/params/hidden_layer_sizes", "4 layers"),
    ("SVR", {"cache_size": 4096}, "/model/params/cache_size", "at most 1024"),
    ("KNeighborsRegressor", {"n_neighbors": 1001}, "/model/params/n_neighbors", "at most 1000"),
    ("MLPRegressor", {"max_fun": 50_001}, "/model/params/max_fun", "at most 50000"),
    ("SVR", {"kernel": "r" * 257}, "/model/params/kernel", "at most 256 characters"),
    ("MLPRegressor", {"hidden_layer_sizes": [1] * 10_001}, "/model/params/hidden_layer_sizes", "at most 10000 items"),
])
def test_caps(diabetes: dict[str, Any], estimator: str, params: dict[str, Any], pointer: str, words: str) -> None:
    found = pointers(check(diabetes, estimator, params=params))
    assert list(found) == [pointer]
    assert words in found[pointer] and "service cap" in found[pointer]


@pytest.mark.parametrize(("estimator", "params"), [
    ("RandomForestRegressor", {"n_estimators": 500}),
    ("Lasso", {"max_iter": 10_000}),
    ("MLPRegressor", {"hidden_layer_sizes": [256, 256, 256, 256]}),
    ("MLPRegressor", {"hidden_layer_sizes": 1024}),
    ("DecisionTreeRegressor", {"max_depth": None}),
    ("SVR", {"max_iter": -1}),
])
def test_values_at_the_caps_pass(diabetes: dict[str, Any], estimator: str, params: dict[str, Any]) -> None:
    assert check(diabetes, estimator, params=params)["ok"] is True


def test_transformer_parameters(diabetes: dict[str, Any]) -> None:
    steps = [
        {"transformer": "StandardScaler", "columns": ["age", "bmi"], "params": {"with_mean": "yes"}},
        {"transformer": "PolynomialFeatures", "columns": ["bp"], "params": {"degree": 4}},
        {"transformer": "SimpleImputer", "columns": ["s1"], "params": {"strategi": "mean"}},
    ]
    found = pointers(check(diabetes, "Ridge", preprocess=steps))
    assert set(found) == {"/model/preprocess/0/params/with_mean", "/model/preprocess/1/params/degree",
                          "/model/preprocess/2/params/strategi"}
    assert "'with_mean' parameter of StandardScaler" in found["/model/preprocess/0/params/with_mean"]
    assert "at most 3" in found["/model/preprocess/1/params/degree"]
    assert "accepted: add_indicator, copy" in found["/model/preprocess/2/params/strategi"]


@pytest.mark.parametrize("dtype", ["U100000", "<U100000", "object", "complex128", "S9", "float128"])
def test_encoder_dtypes_are_numeric_and_small(ctx: WorkerContext, dtype: str) -> None:
    # A 100,000-character unicode dtype makes the encoder's output 400,000 bytes per cell (numpy's
    # dtype("U100000").itemsize); only numeric types of at most 8 bytes are allowed.
    frame = load_diabetes(as_frame=True).frame
    frame["sex"] = pd.Series(["f" if v > 0 else "m" for v in frame["sex"]], dtype="str")
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    for encoder in ("OneHotEncoder", "OrdinalEncoder"):
        steps = [{"transformer": encoder, "columns": ["sex"], "params": {"dtype": dtype}}]
        found = pointers(check(dataset, "Ridge", preprocess=steps))
        assert list(found) == ["/model/preprocess/0/params/dtype"]
        assert "numeric type" in found["/model/preprocess/0/params/dtype"]
    fine = [{"transformer": "OneHotEncoder", "columns": ["sex"], "params": {"dtype": "float32"}}]
    assert check(dataset, "Ridge", preprocess=fine)["ok"] is True


def test_a_document_the_api_never_resolved_is_refused_before_any_import(diabetes: dict[str, Any]) -> None:
    # The API answers these at their pointers (tests/service/submission/test_config.py); a direct call
    # with a name outside the catalog is a caller's error.
    doc = config_document(diabetes, "Ridge")
    doc["model"]["estimator"] = "os.system"
    with pytest.raises(LookupError, match=r"'os\.system' is not in the catalog"):
        jobs.check_config(doc, diabetes["id"])
    with pytest.raises(LookupError, match="'Pickle' is not in the catalog"):
        check(diabetes, "Ridge", preprocess=[{"transformer": "Pickle", "columns": ["age"]}])


def test_unknown_dataset(diabetes: dict[str, Any]) -> None:
    found = pointers(jobs.check_config(config_document(diabetes, "Ridge"), "ds_missing"))
    assert "ds_missing" in found["/dataset"]


@pytest.mark.parametrize(("estimator", "params", "has_proba"), [
    # scikit-learn exposes predict_proba through available_if: SVC only with probability=True,
    # SGDClassifier only for the log_loss and modified_huber losses.
    ("SVC", {}, False),
    ("SVC", {"probability": True}, True),
    ("SGDClassifier", {}, False),
    ("SGDClassifier", {"loss": "log_loss"}, True),
    ("LogisticRegression", {}, True),
    ("RandomForestClassifier", {"n_estimators": 10}, True),
])
def test_has_proba(cancer: dict[str, Any], estimator: str, params: dict[str, Any], has_proba: bool) -> None:
    answer = check(cancer, estimator, params=params)
    assert answer["ok"] is True and answer["has_proba"] is has_proba


def test_categorical_features_accepted_with_an_encoder(ctx: WorkerContext) -> None:
    frame = load_diabetes(as_frame=True).frame
    frame["sex"] = pd.Series(["f" if v > 0 else "m" for v in frame["sex"]], dtype="str")
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    steps = [{"transformer": "OneHotEncoder", "columns": ["sex"], "params": {"handle_unknown": "ignore"}}]
    assert check(dataset, "Ridge", preprocess=steps)["ok"] is True


def test_polynomial_within_the_output_cap(diabetes: dict[str, Any]) -> None:
    names = [c["name"] for c in diabetes["columns"] if c["name"] != "target"]
    # 10 columns, degree 3: comb(13, 3) = 286 outputs, well within the cap.
    fine = [{"transformer": "PolynomialFeatures", "columns": names, "params": {"degree": 3}}]
    assert check(diabetes, "Ridge", preprocess=fine)["ok"] is True


def test_polynomial_output_width_rejected(ctx: WorkerContext) -> None:
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(60, 41)), columns=[f"x{i}" for i in range(40)] + ["y"])
    dataset = add_dataset(ctx, frame.iloc[:50], frame.iloc[50:], "y", "regression")
    names = [f"x{i}" for i in range(40)]
    # comb(43, 3) = 12341 outputs > 10000 (computed with math.comb).
    steps = [{"transformer": "PolynomialFeatures", "columns": names, "params": {"degree": 3}}]
    found = pointers(check(dataset, "Ridge", preprocess=steps))
    assert "12341" in found["/model/preprocess/0/columns"] and "at most 10000" in found["/model/preprocess/0/columns"]


def test_json_lists_for_tuple_parameters_pass_validation(diabetes: dict[str, Any]) -> None:
    steps = [{"transformer": "MinMaxScaler", "columns": ["age"], "params": {"feature_range": [-1, 1]}}]
    assert check(diabetes, "Ridge", preprocess=steps)["ok"] is True
    steps = [{"transformer": "MinMaxScaler", "columns": ["age"], "params": {"feature_range": "wide"}}]
    found = pointers(check(diabetes, "Ridge", preprocess=steps))
    assert "'feature_range' parameter of MinMaxScaler" in found["/model/preprocess/0/params/feature_range"]


@pytest.mark.parametrize(("estimator", "params", "settings"), [
    # scikit-learn's SVC docs: probability=True enables predict_proba; SGDClassifier's: predict_proba
    # "only available for log loss and modified Huber loss".
    ("SVC", {}, ["probability=true"]),
    ("SGDClassifier", {"penalty": "l1"}, ['loss="log_loss"', 'loss="modified_huber"']),
])
def test_the_parameters_that_give_probabilities_are_named(
    cancer: dict[str, Any], estimator: str, params: dict[str, Any], settings: list[str]
) -> None:
    answer = check(cancer, estimator, params=params)
    assert answer == {"ok": True, "has_proba": False, "proba_settings": settings}


def test_a_deviance_the_target_range_leaves_undefined_is_refused(ctx: WorkerContext) -> None:
    # Diabetes with its target's smallest value moved to 0 (the sealed rows keep theirs): scikit-learn's
    # mean_gamma_deviance needs y > 0, mean_poisson_deviance y >= 0, mean_tweedie_deviance(power=2) y > 0.
    frame = load_diabetes(as_frame=True).frame
    development = frame.iloc[:400].copy()
    development.loc[development["target"].idxmin(), "target"] = 0.0
    dataset = add_dataset(ctx, development, frame.iloc[400:], "target", "regression")
    metrics = ["poisson_deviance", "gamma_deviance", "tweedie_deviance(power=2.0)", "tweedie_deviance(power=1.5)"]
    found = pointers(check(dataset, "Ridge", metrics=metrics))
    assert set(found) == {"/metrics/1", "/metrics/2"}
    assert found["/metrics/1"] == ("metric 'gamma_deviance' is defined only for a target > 0; the development "
                                   "rows' target goes down to 0")
    assert check(dataset, "Ridge", metrics=["poisson_deviance"])["ok"] is True


def test_boosting_parameters_are_checked_against_the_catalog(diabetes: dict[str, Any]) -> None:
    # LightGBM's Parameters page: "1 < num_leaves <= 131072"; the service caps trees at 500 and leaves at 1024.
    found = pointers(check(diabetes, "LGBMRegressor", params={
        "num_leaves": 1, "n_estimators": 501, "objective": "binary", "n_jobs": 4, "learning_rate": 0.05}))
    assert set(found) == {"/model/params/num_leaves", "/model/params/n_estimators", "/model/params/objective",
                          "/model/params/n_jobs"}
    assert found["/model/params/num_leaves"] == ("The 'num_leaves' parameter of LGBMRegressor must be an int in "
                                                 "the range (1, 131072]. Got 1 instead.")
    assert "at most 500 (a service cap)" in found["/model/params/n_estimators"]
    assert "leaves" not in found["/model/params/n_estimators"]
    assert "num_leaves must be at most 1024" in pointers(check(diabetes, "LGBMRegressor",
                                                               params={"num_leaves": 2048}))["/model/params/num_leaves"]
    assert check(diabetes, "LGBMRegressor", params={"num_leaves": 63, "max_depth": -1}) == {"ok": True,
                                                                                           "has_proba": False}


def test_xgboost_withheld_and_capped_parameters(diabetes: dict[str, Any], cancer: dict[str, Any]) -> None:
    found = pointers(check(diabetes, "XGBRegressor", params={
        "callbacks": None, "max_depth": 0, "tree_method": "gpu_hist", "enable_categorical": True}))
    assert "callbacks are code" in found["/model/params/callbacks"]
    assert "max_depth must be at least 1 (a service cap)" in found["/model/params/max_depth"]
    assert "'tree_method' parameter of XGBRegressor must be one of 'hist', 'approx', 'exact' or None" in \
        found["/model/params/tree_method"]
    assert "model.categorical_features" in found["/model/params/enable_categorical"]
    assert check(cancer, "XGBClassifier", params={"max_depth": 4}, metrics=["accuracy"]) == {"ok": True,
                                                                                          "has_proba": True}
    # A searched value is checked the same way, at its position.
    config = config_document(diabetes, "XGBRegressor")
    config["search"] = {"grid": {"max_depth": [3, 40]}, "distributions": None, "n_iter": None, "inner_folds": 3}
    found = pointers(jobs.check_config(config, diabetes["id"]))
    assert list(found) == ["/search/grid/max_depth/1"]


def test_values_that_cannot_work_here_are_refused_up_front(diabetes: dict[str, Any]) -> None:
    # scikit-learn still lists 'interior-point' for QuantileRegressor; scipy >= 1.11 has no such solver,
    # and QuantileRegressor itself raises at fit (its own check of the scipy version).
    with pytest.raises(ValueError, match="interior-point"):
        QuantileRegressor(solver="interior-point").fit([[0.0], [1.0], [2.0]], [0.0, 1.0, 2.0])
    found = pointers(check(diabetes, "QuantileRegressor", params={"solver": "interior-point"}))
    assert "'highs', 'highs-ds', 'highs-ipm'" in found["/model/params/solver"]
    assert check(diabetes, "QuantileRegressor", params={"solver": "highs-ds"})["ok"]
    withheld = pointers(check(diabetes, "Ridge", preprocess=[
        {"transformer": "IterativeImputer", "columns": ["bmi"], "params": {"estimator": "Ridge"}}]))
    assert "not expressible in JSON" in withheld["/model/preprocess/0/params/estimator"]


# -- the trial fit: a configuration that cannot fit at all is refused, naming the step ----------------------

def _sklearn_error(fit: Any) -> str:
    with pytest.raises(Exception) as raised:
        fit()
    return f"{type(raised.value).__name__}: {raised.value}"


def test_missing_values_fed_to_an_estimator_that_refuses_them(ctx: WorkerContext) -> None:
    # Five missing bmi values among 420 development rows, at the end of them: the sample still sees them.
    frame = load_diabetes(as_frame=True).frame.sort_values("bmi").reset_index(drop=True)
    frame.loc[415:419, "bmi"] = np.nan
    dataset = add_dataset(ctx, frame.iloc[:420], frame.iloc[420:], "target", "regression")
    dev = frame.iloc[:420]
    # scikit-learn's own words for the same fit (Ridge refuses NaN in X):
    words = _sklearn_error(lambda: Ridge().fit(dev.drop(columns="target").to_numpy(), dev["target"].to_numpy()))
    found = pointers(check(dataset, "Ridge"))
    assert list(found) == ["/model/estimator"]
    assert "Ridge" in found["/model/estimator"] and words.split(".")[0] in found["/model/estimator"]
    imputed = [{"transformer": "SimpleImputer", "columns": ["bmi"], "params": {"strategy": "median"}}]
    assert check(dataset, "Ridge", preprocess=imputed)["ok"] is True


def test_features_registered_without_missing_values_are_not_scanned_for_them(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    frame = load_diabetes(as_frame=True).frame
    frame.loc[5, "bmi"] = np.nan  # one missing bmi among the development rows, none in the other columns
    dataset = add_dataset(ctx, frame.iloc[:420], frame.iloc[420:], "target", "regression")
    scanned: list[int] = []
    real = trial_fit._rows_missing_each_feature
    monkeypatch.setattr(trial_fit, "_rows_missing_each_feature", lambda data: scanned.append(1) or real(data))
    assert check(dataset, "Ridge", features=["age", "bp"])["ok"] is True  # recorded complete: no scan
    assert scanned == []
    found = pointers(check(dataset, "Ridge", features=["age", "bmi"]))  # bmi has one: scanned, and found
    assert scanned == [1] and list(found) == ["/model/estimator"]


def test_a_mean_imputer_on_a_text_column_names_its_step(ctx: WorkerContext) -> None:
    from sklearn.impute import SimpleImputer

    frame = load_diabetes(as_frame=True).frame
    frame["sex"] = pd.Series(["f" if v > 0 else "m" for v in frame["sex"]], dtype="str")
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    words = _sklearn_error(lambda: SimpleImputer(strategy="mean").fit(frame[["sex"]].astype(object)))
    steps = [{"transformer": "StandardScaler", "columns": ["age"], "params": {}},
             {"transformer": "SimpleImputer", "columns": ["sex"], "params": {"strategy": "mean"}},
             {"transformer": "OneHotEncoder", "columns": ["sex"], "params": {}}]
    found = pointers(check(dataset, "Ridge", preprocess=steps))
    assert list(found) == ["/model/preprocess/1"]
    assert "SimpleImputer on sex" in found["/model/preprocess/1"]
    assert words.split(":")[0] in found["/model/preprocess/1"] and "non-numeric" in found["/model/preprocess/1"]


def test_an_incompatible_solver_and_penalty_is_refused(cancer: dict[str, Any]) -> None:
    from sklearn.linear_model import LogisticRegression

    X, y = load_breast_cancer(return_X_y=True)
    with pytest.warns(FutureWarning):  # scikit-learn 1.8 deprecated penalty; it still refuses the pair
        words = _sklearn_error(lambda: LogisticRegression(penalty="l1", solver="lbfgs").fit(X, y))
    found = pointers(check(cancer, "LogisticRegression", params={"penalty": "l1", "solver": "lbfgs"},
                           metrics=["accuracy"]))
    assert list(found) == ["/model/estimator"]
    assert words in found["/model/estimator"]


def test_a_class_sorted_table_is_sampled_with_every_class(ctx: WorkerContext) -> None:
    # scikit-learn's breast cancer table sorted by class: a prefix would hold one class only, and
    # LogisticRegression refuses a single class; the seeded sample (plus rows of each class) holds both.
    from worker.jobs.trial_fit import sample_rows
    from worker.learning.development import load_development

    frame = load_breast_cancer(as_frame=True).frame.sort_values("target", kind="stable")
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    dataset = add_dataset(ctx, frame.iloc[:500], frame.iloc[500:], "target", "classification", scheme="stratified")
    assert check(dataset, "LogisticRegression", params={"max_iter": 5000}, metrics=["accuracy"])["ok"] is True
    features = [c["name"] for c in dataset["columns"] if c["name"] != "target"]
    data, _ = load_development(ctx.settings, dataset, features)
    rows = sample_rows(data, "classification", 20)
    assert set(np.unique(data.y[rows])) == set(np.unique(data.y))
    assert np.array_equal(rows, sample_rows(data, "classification", 20))  # seeded: the same every time
