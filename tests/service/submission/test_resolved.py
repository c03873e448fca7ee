"""The resolved configuration and its stored document: the same keys and values as the records DB holds."""

from __future__ import annotations

import dataclasses
import json
from typing import Any

import pytest

from service.catalog import load_catalog
from service.submission.config import (
    DatasetRef,
    ModelSpec,
    PreprocessStep,
    SearchSpec,
    SubmissionRequest,
    ValidationSpec,
    resolve,
)
from service.submission.resolved import ResolvedConfig, ValidationPlan
from service.vault.folds import FoldPlan
from tests.support.declared import ROUTES

GRID_REQUEST = SubmissionRequest(
    dataset=DatasetRef("ds_1"),
    model=ModelSpec("Ridge", params={"solver": "svd"}, features=("distance_km", "depot"),
                    preprocess=(PreprocessStep("OneHotEncoder", ("depot",), {"handle_unknown": "ignore"}),)),
    validation=ValidationSpec(folds=4, repeats=2, learning_curve=(0.5, 1.0)),
    metrics=("rmse", "r2"), label="ridge", search=SearchSpec(grid={"alpha": (0.1, 1.0)}, inner_folds=3),
)
# The documents these requests resolve to, key for key, as the records DB's config column holds them
# (written before resolve returned a typed value): stored rows must read and write back unchanged.
GRID_DOCUMENT: dict[str, Any] = {
    "model": {"estimator": "Ridge", "params": {"solver": "svd"}, "features": ["distance_km", "depot"],
              "preprocess": [{"transformer": "OneHotEncoder", "columns": ["depot"],
                              "params": {"handle_unknown": "ignore"}}]},
    "validation": {"scheme": "kfold", "folds": 4, "seed": 42, "repeats": 2, "plan_overridden": True,
                   "learning_curve": [0.5, 1.0]},
    "metrics": ["rmse", "r2"],
    "search": {"grid": {"alpha": [0.1, 1.0]}, "distributions": None, "n_iter": None, "inner_folds": 3},
    "label": "ridge", "task": "regression", "target": "fuel_litres",
}
FIVE_BY_TWO_REQUEST = SubmissionRequest(
    dataset=DatasetRef("ds_1"), model=ModelSpec("Ridge", features=("distance_km",)),
    validation=ValidationSpec(test="5x2cv", learning_curve=()),
    search=SearchSpec(distributions={"alpha": {"log_uniform": [0.01, 10.0]}}, n_iter=4),
)
FIVE_BY_TWO_DOCUMENT: dict[str, Any] = {
    "model": {"estimator": "Ridge", "params": {}, "features": ["distance_km"], "preprocess": []},
    "validation": {"scheme": "kfold", "folds": 2, "seed": 42, "repeats": 5, "plan_overridden": True,
                   "test": "5x2cv", "learning_curve": [0.1, 0.325, 0.55, 0.775, 1.0]},
    "metrics": ["rmse", "mae", "r2"],
    "search": {"grid": None, "distributions": {"alpha": {"log_uniform": [0.01, 10.0]}}, "n_iter": 4,
               "inner_folds": 3},
    "label": "", "task": "regression", "target": "fuel_litres",
}
CASES = [(GRID_REQUEST, GRID_DOCUMENT), (FIVE_BY_TWO_REQUEST, FIVE_BY_TWO_DOCUMENT)]


@pytest.mark.parametrize(("request_", "document"), CASES, ids=["grid", "5x2cv"])
def test_the_document_is_the_stored_format_key_for_key(request_: SubmissionRequest, document: dict[str, Any]) -> None:
    resolved = resolve(request_, ROUTES, load_catalog())
    assert resolved.to_document() == document
    assert list(resolved.to_document()) == list(document)  # the key order of the stored JSON too
    assert list(resolved.to_document()["validation"]) == list(document["validation"])


@pytest.mark.parametrize(("request_", "document"), CASES, ids=["grid", "5x2cv"])
def test_a_configuration_survives_its_document(request_: SubmissionRequest, document: dict[str, Any]) -> None:
    resolved = resolve(request_, ROUTES, load_catalog())
    checked = dataclasses.replace(resolved, metrics=(*resolved.metrics, "mae"), linear=True)
    for config in (resolved, checked):
        assert ResolvedConfig.from_document(config.to_document()) == config
        # ... through the JSON of the records DB and the job queue as well
        assert ResolvedConfig.from_document(json.loads(json.dumps(config.to_document()))) == config
    assert checked.to_document() == {**document, "metrics": [*document["metrics"], "mae"], "linear": True}
    assert ResolvedConfig.from_document(document).to_document() == document


def test_linear_is_left_out_until_a_worker_has_checked_the_configuration() -> None:
    resolved = resolve(GRID_REQUEST, ROUTES, load_catalog())
    assert resolved.linear is None and "linear" not in resolved.to_document()
    assert dataclasses.replace(resolved, linear=False).to_document()["linear"] is False


def test_the_fold_plan_is_the_datasets_unless_the_submission_overrides_it() -> None:
    own = resolve(dataclasses.replace(GRID_REQUEST, validation=ValidationSpec()), ROUTES, load_catalog())
    assert own.validation.fold_plan() == FoldPlan.from_document(ROUTES["fold_plan"])
    overridden = resolve(GRID_REQUEST, ROUTES, load_catalog())
    assert overridden.validation.fold_plan() == FoldPlan("kfold", 4, 42)


def test_documents_stored_before_a_key_existed_still_read() -> None:
    # Readers used to default a missing repeats to 1 and a missing plan_overridden, search or linear to none.
    older = {k: v for k, v in GRID_DOCUMENT.items() if k != "search"}
    older["validation"] = {"scheme": "kfold", "folds": 5, "seed": 42}
    config = ResolvedConfig.from_document(older)
    assert config.validation == ValidationPlan("kfold", 5, 42, repeats=1, plan_overridden=False)
    assert config.search is None and config.linear is None
