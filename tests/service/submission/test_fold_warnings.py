"""Warnings at submission: a fold plan whose training folds lack a class is named in the document."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from sklearn.model_selection import KFold

from service.api.submission_schemas import SubmissionSchema
from service.vault.store import load_development_frame
from tests.support.api import Api
from tests.support.datasets import csv_bytes
from tests.support.frames import iris_frame

FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]


def iris_sorted_by_class() -> bytes:
    """Iris (Fisher 1936, bundled with scikit-learn) sorted by class, as a CSV upload."""
    frame = iris_frame().sort_values("target", kind="stable").reset_index(drop=True)
    frame.columns = [*FEATURES, "target"]
    return csv_bytes(frame)


def submit(api: Api, ds: dict[str, Any]) -> dict[str, Any]:
    body = {"dataset": ds["id"], "metrics": ["accuracy"],
            "model": {"estimator": "LogisticRegression", "params": {"max_iter": 1000}, "features": FEATURES}}
    reply = api.post("submitter", "/v1/submissions", json=body)
    assert reply.status_code == 202, reply.get_data(as_text=True)
    return dict(reply.get_json())


def test_a_contiguous_plan_on_rows_sorted_by_class_is_warned_about(
    api: Api, worker_says_ok: list[dict[str, Any]]
) -> None:
    reply = api.upload("steward", iris_sorted_by_class(), name="iris", target="target", task="classification",
                       fold_scheme="contiguous", folds=3)
    assert reply.status_code == 201, reply.get_data(as_text=True)
    ds = reply.get_json()
    doc = submit(api, ds)
    assert SubmissionSchema().validate(doc) == {}
    # Reference: scikit-learn's KFold(3, shuffle=False) (the contiguous plan) on the development rows;
    # the classes absent from each training part, by hand.
    y = load_development_frame(api.settings, ds["id"], columns=["target"])["target"].to_numpy()
    expected = [{"repeat": 0, "fold": k, "missing_classes": [str(c) for c in np.setdiff1d(np.unique(y), y[train])]}
                for k, (train, _test) in enumerate(KFold(3, shuffle=False).split(y))]
    [warning] = doc["warnings"]
    assert warning["code"] == "class_missing_from_training"
    assert warning["folds"] == [e for e in expected if e["missing_classes"]] and len(warning["folds"]) == 3
    assert warning["detail"].startswith("3 of 3 training folds of this contiguous fold plan lack a class (0, 1, 2)")
    assert api.get("submitter", f"/v1/submissions/{doc['id']}").get_json()["warnings"] == doc["warnings"]


@pytest.mark.parametrize("scheme", ["stratified", "kfold"])
def test_a_plan_that_trains_every_fold_on_every_class_warns_of_nothing(
    api: Api, worker_says_ok: list[dict[str, Any]], scheme: str
) -> None:
    reply = api.upload("steward", iris_sorted_by_class(), name="iris", target="target", task="classification",
                       fold_scheme=scheme, folds=3)
    assert reply.status_code == 201, reply.get_data(as_text=True)
    assert submit(api, reply.get_json())["warnings"] == []
