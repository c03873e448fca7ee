"""Resolution of submission requests against a dataset record and the catalog (no worker involved)."""

from __future__ import annotations

from typing import Any

import pytest

from service.catalog import load_catalog
from service.errors import ConfigRejected
from service.submission.config import (
    DatasetRef,
    ModelSpec,
    PreprocessStep,
    SubmissionRequest,
    ValidationSpec,
    config_fingerprint,
    resolve,
)
from tests.support.declared import ROUTES

DATASET = ROUTES


def _request(model: ModelSpec, **kw: Any) -> SubmissionRequest:
    return SubmissionRequest(dataset=DatasetRef("ds_1"), model=model, **kw)


def _pointers(exc: pytest.ExceptionInfo[ConfigRejected]) -> dict[str, str]:
    return {p.pointer: p.detail for p in exc.value.problems}


def test_defaults_fill_features_metrics_and_plan() -> None:
    doc = resolve(_request(ModelSpec("Ridge", preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))),
                  DATASET, load_catalog()).to_document()
    assert doc["model"]["features"] == ["distance_km", "stops", "depot"]
    assert doc["metrics"] == ["rmse", "mae", "r2"]
    assert doc["validation"] == {"scheme": "kfold", "folds": 5, "seed": 42, "repeats": 1, "plan_overridden": False}


def test_every_problem_is_reported_at_once_with_its_pointer() -> None:
    request = _request(
        ModelSpec("LogisticRegression", features=("distance_km", "fuel_litres", "nowhere"),
                  preprocess=(PreprocessStep("Wizard", ("distance_km",)),)),
        metrics=("accuracy",), validation=ValidationSpec(folds=1, repeats=11),
    )
    with pytest.raises(ConfigRejected) as exc:
        resolve(request, DATASET, load_catalog())
    pointers = _pointers(exc)
    assert "classification" in pointers["/model/estimator"] and "Ridge" in pointers["/model/estimator"]
    assert "target" in pointers["/model/features/1"]
    assert "nowhere" in pointers["/model/features/2"]
    assert "StandardScaler" in pointers["/model/preprocess/0/transformer"]
    assert "rmse" in pointers["/metrics/0"]
    assert pointers["/validation/folds"] == "folds must be between 2 and 20, got 1"
    assert "got 11" in pointers["/validation/repeats"]


def test_categorical_feature_needs_an_encoder() -> None:
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("Ridge")), DATASET, load_catalog())
    assert "depot" in _pointers(exc)["/model/features/2"]


def test_steps_on_overlapping_columns_must_name_the_same_columns() -> None:
    steps = (PreprocessStep("SimpleImputer", ("distance_km", "stops")), PreprocessStep("StandardScaler", ("stops",)),
             PreprocessStep("OneHotEncoder", ("depot",)))
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("Ridge", preprocess=steps)), DATASET, load_catalog())
    assert "/model/preprocess/1/columns/0" in _pointers(exc)
    assert "already in step 0 with other columns" in _pointers(exc)["/model/preprocess/1/columns/0"]
    chained = (PreprocessStep("SimpleImputer", ("distance_km", "stops")),
               PreprocessStep("StandardScaler", ("distance_km", "stops")), PreprocessStep("OneHotEncoder", ("depot",)))
    config = resolve(_request(ModelSpec("Ridge", preprocess=chained)), DATASET, load_catalog())
    names = [s.transformer for s in config.model.preprocess]
    assert names == ["SimpleImputer", "StandardScaler", "OneHotEncoder"]


def test_names_outside_the_catalog_are_refused_with_the_accepted_ones() -> None:
    model = ModelSpec("os.system", preprocess=(PreprocessStep("Pickle", ("distance_km",)),
                                               PreprocessStep("OneHotEncoder", ("depot",))))
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(model), DATASET, load_catalog())
    pointers = _pointers(exc)
    assert "'os.system' is not in the catalog" in pointers["/model/estimator"]
    assert "Ridge" in pointers["/model/estimator"] and "LogisticRegression" not in pointers["/model/estimator"]
    assert "'Pickle' is not in the catalog" in pointers["/model/preprocess/0/transformer"]


def test_a_step_column_must_be_a_feature() -> None:
    steps = (PreprocessStep("StandardScaler", ("stops",)),)
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("Ridge", features=("distance_km",), preprocess=steps)), DATASET, load_catalog())
    assert _pointers(exc) == {"/model/preprocess/0/columns/0": "column 'stops' is not among the features "
                                                               "(distance_km)"}


def test_time_plans_allow_one_repeat_only() -> None:
    dataset = {**DATASET, "fold_plan": {"scheme": "time", "folds": 5, "seed": 1}}
    model = ModelSpec("Ridge", features=("distance_km",))
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(model, validation=ValidationSpec(repeats=2)), dataset, load_catalog())
    assert "/validation/repeats" in _pointers(exc)


def test_fingerprint_follows_what_determines_the_result() -> None:
    model = ModelSpec("Ridge", params={"alpha": 1.0}, features=("distance_km",))
    a = resolve(_request(model, label="first"), DATASET, load_catalog())
    b = resolve(_request(model, label="second"), DATASET, load_catalog())
    c = resolve(_request(ModelSpec("Ridge", params={"alpha": 2.0}, features=("distance_km",))), DATASET,
                load_catalog())
    assert config_fingerprint(a, "fp") == config_fingerprint(b, "fp")  # a label changes nothing computed
    assert config_fingerprint(a, "fp") != config_fingerprint(c, "fp")
    assert config_fingerprint(a, "fp") != config_fingerprint(a, "other-data")


def test_search_caps_count_the_learning_curve_sizes() -> None:
    from service.submission.config import SearchSpec

    model = ModelSpec("Ridge", features=("distance_km",))
    grid = SearchSpec(grid={"alpha": tuple(float(a) for a in range(40))}, inner_folds=5)  # 40 x 5 x 5 = 1000 fits
    resolved = resolve(_request(model, search=grid), DATASET, load_catalog()).search
    assert resolved is not None and resolved.inner_folds == 5
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(model, search=grid, validation=ValidationSpec(learning_curve=(0.25, 0.5, 1.0))),
                DATASET, load_catalog())
    assert "x 3 learning-curve sizes = 3000 fits" in _pointers(exc)["/search"]


def _metrics(dataset: dict[str, Any], *metrics: Any) -> list[str]:
    estimator = "Ridge" if dataset["task"] == "regression" else "LogisticRegression"
    model = ModelSpec(estimator, features=("distance_km", "stops"))
    return list(resolve(_request(model, metrics=metrics), dataset, load_catalog()).metrics)


def _refusals(dataset: dict[str, Any], *metrics: Any) -> dict[str, str]:
    estimator = "Ridge" if dataset["task"] == "regression" else "LogisticRegression"
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec(estimator, features=("distance_km", "stops")), metrics=metrics), dataset,
                load_catalog())
    return _pointers(exc)


BINARY = {**DATASET, "task": "classification", "classes": ["late", "on time"]}
THREE = {**DATASET, "task": "classification", "classes": ["a", "b", "c"]}


def test_metric_choices_resolve_to_keys_that_spell_them_out() -> None:
    assert _metrics(DATASET, "pinball_loss(alpha=0.9)", {"name": "tweedie_deviance", "power": 1.5}, "mape") == [
        "pinball_loss(alpha=0.9)", "tweedie_deviance(power=1.5)", "mape"]
    # Two classes: binary averaging on the larger label unless told; a label with a space is percent-encoded.
    assert _metrics(BINARY, "f1", {"name": "precision", "pos_label": "late"}, "recall(average=weighted)",
                    "average_precision") == [
        "f1(average=binary;pos_label=on%20time)", "precision(average=binary;pos_label=late)",
        "recall(average=weighted)", "average_precision(pos_label=on%20time)"]
    assert _metrics(THREE, "f1", "average_precision", {"name": "recall", "average": "micro"}) == [
        "f1(average=macro)", "average_precision(average=macro)", "recall(average=micro)"]
    # A key resolves to itself, so one copied from a summary or policy is the same metric.
    spelled = "f1(average=binary;pos_label=on%20time)"
    assert _metrics(BINARY, spelled, "f1", 'f1(average=binary, pos_label="on time")') == [spelled]


def test_choices_are_part_of_the_configuration_fingerprint() -> None:
    model = ModelSpec("Ridge", features=("distance_km",))
    fingerprints = {
        config_fingerprint(resolve(_request(model, metrics=(m,)), DATASET, load_catalog()), "fp")
        for m in ("pinball_loss(alpha=0.9)", "pinball_loss(alpha=0.5)", "tweedie_deviance(power=1.5)")}
    assert len(fingerprints) == 3


def test_an_unknown_metric_is_refused_as_unknown_with_the_accepted_names() -> None:
    found = _refusals(BINARY, "accuracy", "acuracy", "rmse")
    assert found["/metrics/1"].startswith("unknown metric 'acuracy'; metrics for classification: accuracy, ")
    assert "matthews_corrcoef" in found["/metrics/1"]
    assert found["/metrics/2"].startswith("metric 'rmse' is a regression metric and does not apply to a "
                                          "classification dataset")
    assert "/metrics/0" not in found


@pytest.mark.parametrize(("dataset", "metric", "words"), [
    (DATASET, "pinball_loss", "pinball_loss' needs alpha to be declared"),
    (DATASET, "pinball_loss(alpha=1.5)", "alpha is a quantile in (0, 1), got '1.5'"),
    (DATASET, {"name": "tweedie_deviance", "power": 0.5}, "power must be <= 0 or >= 1"),
    (DATASET, {"name": "mape", "alpha": 0.5}, "metric 'mape' has no option 'alpha'; it takes no options"),
    (THREE, "f1(average=binary)", "average=binary needs a two-class dataset; this one has 3 classes"),
    (THREE, "average_precision(pos_label=a)", "pos_label is for two-class datasets"),
    (BINARY, "f1(average=samples)", "average must be one of binary, micro, macro, weighted, got 'samples'"),
    (BINARY, "f1(pos_label=maybe)", "pos_label must be one of the dataset's classes (late, on time)"),
    (BINARY, "f1(average=macro, pos_label=late)", "pos_label goes with average=binary only"),
    (BINARY, "f1(average=macro", "a metric is written name or name(option=value, ...)"),
    (BINARY, 'f1(pos_label="late)', "option 'pos_label' has a quoted value that is not a JSON string"),
    (BINARY, "f1(average=macro;;)", "options are written option=value and separated by ';'"),
    (THREE, "average_precision(pos_label=a)", "declare average (micro, macro, weighted)"),
])
def test_bad_choices_are_refused_with_what_is_accepted(dataset: dict[str, Any], metric: Any, words: str) -> None:
    assert words in _refusals(dataset, metric)["/metrics/0"]


def test_native_categorical_columns_need_no_encoder() -> None:
    # HistGradientBoosting, LightGBM and XGBoost take a declared categorical column as it is.
    for estimator in ("HistGradientBoostingRegressor", "LGBMRegressor", "XGBRegressor"):
        doc = resolve(_request(ModelSpec(estimator, categorical_features=("depot",))), DATASET,
                      load_catalog()).to_document()
        assert doc["model"]["categorical_features"] == ["depot"]
    # Without a declaration the document (and so the fingerprint) is what it was before.
    plain = resolve(_request(ModelSpec("Ridge", preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))),
                    DATASET, load_catalog()).to_document()
    assert "categorical_features" not in plain["model"]


def test_native_categorical_declarations_are_checked() -> None:
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("Ridge", categorical_features=("depot",))), DATASET, load_catalog())
    found = _pointers(exc)
    assert "no native categorical support" in found["/model/categorical_features"]
    assert "LGBMRegressor" in found["/model/categorical_features"]
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("LGBMRegressor", categorical_features=("depot", "stops", "nowhere"),
                                   preprocess=(PreprocessStep("StandardScaler", ("stops",)),))),
                DATASET, load_catalog())
    found = _pointers(exc)
    assert "numeric" in found["/model/categorical_features/1"]
    assert "not among the features" in found["/model/categorical_features/2"]
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("LGBMRegressor", categorical_features=("depot",),
                                   preprocess=(PreprocessStep("OrdinalEncoder", ("depot",)),))),
                DATASET, load_catalog())
    assert "also in a preprocess step" in _pointers(exc)["/model/categorical_features/0"]


def test_nested_estimators_are_declarative_capped_and_flat() -> None:
    member = {"name": "ridge", "estimator": "Ridge"}
    ok = resolve(_request(ModelSpec("VotingRegressor", params={"estimators": [member, {**member, "name": "r2"}]},
                                    preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))),
                 DATASET, load_catalog())
    assert ok.model.params["estimators"][0] == member
    with pytest.raises(ConfigRejected) as exc:
        resolve(_request(ModelSpec("StackingRegressor", params={
            "estimators": [member, member, {"name": "x__y", "estimator": "LogisticRegression"},
                           {"name": "inner", "estimator": "VotingRegressor"}, member, member],
            "final_estimator": "Ridge"}, preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))),
            DATASET, load_catalog())
    found = _pointers(exc)
    assert "at most 5 estimators" in found["/model/params/estimators"]
    assert "used twice" in found["/model/params/estimators/1/name"]
    assert "is a classification estimator" in found["/model/params/estimators/2/estimator"]
    assert "'__'" in found["/model/params/estimators/2/name"]
    assert "nests estimators itself" in found["/model/params/estimators/3/estimator"]
    assert "is an object" in found["/model/params/final_estimator"]


def test_target_functions_are_named_from_the_allow_list() -> None:
    def refused(params: dict[str, Any]) -> dict[str, str]:
        with pytest.raises(ConfigRejected) as exc:
            resolve(_request(ModelSpec("TransformedTargetRegressor", params=params,
                                       preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))),
                    DATASET, load_catalog())
        return _pointers(exc)

    assert "'log1p' (inverse_func 'expm1')" in refused({"func": "os.system"})["/model/params/func"]
    assert "the inverse of 'sqrt' is 'square'" in refused({"func": "sqrt", "inverse_func": "expm1"})[
        "/model/params/inverse_func"]
    assert "needs a func" in refused({"inverse_func": "expm1"})["/model/params/inverse_func"]
    resolve(_request(ModelSpec("TransformedTargetRegressor", params={"func": "log1p", "regressor": {
        "estimator": "Ridge"}}, preprocess=(PreprocessStep("OneHotEncoder", ("depot",)),))), DATASET, load_catalog())
