"""Submission endpoints: 202 + Location, idempotency, ETag/304, paging, folds, cancel, and no half-written rows."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import pytest
from rq.job import Job
from rq.serializers import JSONSerializer
from sklearn.model_selection import KFold

from service.api.submission_schemas import SubmissionSchema
from service.records import holdout_releases, submissions
from service.submission import dispatch, team_queues
from service.submission.resolved import ResolvedConfig
from service.vault.folds import FoldPlan
from service.vault.store import load_development_frame
from service.vocabulary import LIVE_STATES
from tests.support.api import count_submissions, submission_body

if TYPE_CHECKING:
    from tests.support.api import Api



def test_submit_answers_202_with_location_and_the_document(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    reply = api.post("submitter", "/v1/submissions", json=submission_body(dataset))
    assert reply.status_code == 202, reply.get_data(as_text=True)
    doc = reply.get_json()
    assert reply.headers["Location"] == f"/v1/submissions/{doc['id']}"
    assert doc["id"].startswith("sub_") and doc["dataset"] == dataset["id"] and doc["state"] == "queued"
    assert doc["progress"] == {"folds_done": 0, "folds_total": 5}
    assert doc["label"] == "ridge on four columns" and doc["result"] is None and doc["error"] is None
    assert SubmissionSchema().validate(doc) == {}
    # The worker was asked about the normalised configuration, not the raw body.
    assert worker_says_ok[0]["model"]["estimator"] == "Ridge" and worker_says_ok[0]["metrics"] == ["rmse", "r2"]
    queue = team_queues.team_queue(api.app.extensions["sealfold"].redis, api.settings, "fleet")  # the submitter's
    # The holdout job first (it needs nothing from the folds and is the longest job), then the
    # folds (a small table's: one job for all five); the summary and the verdict wait (deferred) for what they read.
    assert queue.job_ids == [dispatch.holdout_job_id(doc["id"]), dispatch.folds_job_id(doc["id"])]
    jobs = {j.id: j for j in Job.fetch_many([dispatch.holdout_job_id(doc["id"]), dispatch.summary_job_id(doc["id"]),
                                             dispatch.verdict_job_id(doc["id"])], connection=queue.connection,
                                            serializer=JSONSerializer) if j is not None}
    assert jobs[dispatch.holdout_job_id(doc["id"])].dependency_ids == []
    assert dispatch.summary_job_id(doc["id"]) not in jobs  # the job of every fold summarises them itself
    assert sorted(jobs[dispatch.verdict_job_id(doc["id"])].dependency_ids) == [dispatch.folds_job_id(doc["id"]),
                                                                               dispatch.holdout_job_id(doc["id"])]
    assert api.get("submitter", reply.headers["Location"]).get_json() == doc


def test_the_stored_configuration_is_the_resolved_document_and_reads_back_unchanged(
    api: Api, dataset: dict[str, Any], submitted: dict[str, Any]
) -> None:
    # The config column's format, key for key, as rows already in records DBs hold it.
    stored = submissions.get(api.engine, submitted["id"])
    assert stored is not None
    features = ["age", "bmi", "bp", "s5"]
    expected = {
        "model": {"estimator": "Ridge", "params": {"alpha": 1.0}, "features": features,
                  "preprocess": [{"transformer": "StandardScaler", "columns": features, "params": {}}]},
        "validation": {"scheme": "kfold", "folds": 5, "seed": dataset["fold_plan"]["seed"], "repeats": 1,
                       "plan_overridden": False},
        "metrics": ["rmse", "r2"], "search": None, "label": "ridge on four columns", "task": "regression",
        "target": "target", "linear": True,
    }
    assert stored["config"] == expected and list(stored["config"]) == list(expected)
    config = ResolvedConfig.from_document(stored["config"])
    assert config.to_document() == stored["config"] and config.linear is True
    assert config.validation.fold_plan() == FoldPlan.from_document(dataset["fold_plan"])


def test_a_pinned_fingerprint_must_match(api: Api, dataset: dict[str, Any],
                                         worker_says_ok: list[dict[str, Any]]) -> None:
    wrong = {"id": dataset["id"], "fingerprint": "0" * 64}
    problem = api.problem(api.post("submitter", "/v1/submissions", json=submission_body(dataset, dataset=wrong)), 409)
    assert dataset["fingerprint"] in problem["detail"]
    assert count_submissions(api) == 0
    right = {"id": dataset["id"], "fingerprint": dataset["fingerprint"]}
    assert api.post("submitter", "/v1/submissions", json=submission_body(dataset, dataset=right)).status_code == 202


@pytest.mark.parametrize(("change", "pointer"), [
    ({"model": {"estimator": "NoSuchRegressor"}}, "/model/estimator"),
    ({"model": {"estimator": "Ridge", "features": ["age", "weight"]}}, "/model/features/1"),
    ({"metrics": ["accuracy"]}, "/metrics/0"),
    ({"metrics": ["r2", "rmsle"]}, "/metrics/1"),
    ({"metrics": [{"name": "pinball_loss"}]}, "/metrics/0"),
    ({"metrics": [7]}, "/metrics/0"),
    ({"validation": {"folds": 1}}, "/validation/folds"),
    ({"validation": {"folds": "5"}}, "/validation/folds"),
    ({"model": {"estimator": "Ridge", "params": []}}, "/model/params"),
    ({"model": {"estimator": "Ridge", "preprocess": [{"columns": ["age"]}]}}, "/model/preprocess/0/transformer"),
])
def test_bad_configuration_is_422_with_a_pointer_and_leaves_no_record(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]], change: dict[str, Any], pointer: str
) -> None:
    problem = api.problem(api.post("submitter", "/v1/submissions", json=submission_body(dataset, **change)), 422)
    assert pointer in api.pointers(problem), problem
    assert count_submissions(api) == 0 and worker_says_ok == []


def test_no_worker_to_check_the_configuration_is_503_and_leaves_no_record(
    api: Api, dataset: dict[str, Any]
) -> None:
    # fakeredis has no worker registered, so the real check gives up at once.
    problem = api.problem(api.post("submitter", "/v1/submissions", json=submission_body(dataset)), 503)
    assert "worker" in problem["detail"]
    assert count_submissions(api) == 0


def test_unknown_or_foreign_dataset_is_404(api: Api, dataset: dict[str, Any],
                                           worker_says_ok: list[dict[str, Any]]) -> None:
    theirs = api.problem(api.post("other_submitter", "/v1/submissions", json=submission_body(dataset)), 404)
    assert api.pointers(theirs) == ["/dataset"]
    api.problem(api.post("submitter", "/v1/submissions", json=submission_body(dataset, dataset="ds_nope")), 404)
    assert count_submissions(api) == 0


def test_idempotency_key_replays_the_first_submission(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    headers = {"Idempotency-Key": "deploy-2291"}
    first = api.post("submitter", "/v1/submissions", json=submission_body(dataset), headers=headers)
    again = api.post("submitter", "/v1/submissions", json=submission_body(dataset), headers=headers)
    assert first.status_code == 202 and again.status_code == 200
    assert again.get_json()["id"] == first.get_json()["id"]
    assert again.headers["Location"] == first.headers["Location"]
    other = api.post("submitter", "/v1/submissions", json=submission_body(dataset, label="changed"), headers=headers)
    assert "Idempotency-Key" in api.problem(other, 422)["detail"]
    # Keys are per API key: another submitter may use the same Idempotency-Key for its own submission
    # (a different model here, since the same model on the same data would be the team's existing one).
    other_model = submission_body(dataset, metrics=["rmse"])
    theirs = api.post("submitter2", "/v1/submissions", json=other_model, headers=headers)
    assert theirs.status_code == 202 and theirs.get_json()["id"] != first.get_json()["id"]
    assert count_submissions(api) == 2
    too_long = api.post("submitter", "/v1/submissions", json=submission_body(dataset),
                        headers={"Idempotency-Key": "k" * 201})
    assert api.pointers(api.problem(too_long, 422)) == ["/Idempotency-Key"]


def test_etag_and_if_none_match(api: Api, submitted: dict[str, Any]) -> None:
    path = f"/v1/submissions/{submitted['id']}"
    first = api.get("submitter", path)
    etag = first.headers["ETag"]
    assert etag.startswith('"') and first.headers["Cache-Control"] == "private, no-cache"
    unchanged = api.get("submitter", path, headers={"If-None-Match": etag})
    assert unchanged.status_code == 304 and unchanged.get_data() == b"" and unchanged.headers["ETag"] == etag
    submissions.mark_running(api.engine, submitted["id"])
    changed = api.get("submitter", path, headers={"If-None-Match": etag})
    assert changed.status_code == 200 and changed.get_json()["state"] == "running"
    assert changed.headers["ETag"] != etag


def test_list_is_newest_first_in_pages(api: Api, dataset: dict[str, Any],
                                       worker_says_ok: list[dict[str, Any]]) -> None:
    # Five different models (alpha varies): identical ones would be one submission.
    made = [api.post("submitter", "/v1/submissions", json=submission_body(dataset, model={
        **submission_body(dataset)["model"], "params": {"alpha": 1.0 + i}})).get_json()["id"] for i in range(5)]
    api.post("other_steward", "/v1/submissions", json=submission_body(dataset))  # 404: not their dataset
    seen: list[str] = []
    cursor = None
    while True:
        query = {"limit": 2} if cursor is None else {"limit": 2, "cursor": cursor}
        page = api.get("submitter2", "/v1/submissions", query_string=query).get_json()
        seen += [s["id"] for s in page["submissions"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == made[::-1]
    assert api.get("other_submitter", "/v1/submissions").get_json()["submissions"] == []
    bad = api.problem(api.get("submitter", "/v1/submissions", query_string={"cursor": "garbage"}), 422)
    assert api.pointers(bad) == ["/cursor"]
    assert api.pointers(api.problem(api.get("submitter", "/v1/submissions?limit=0"), 422)) == ["/limit"]


def test_folds_list_development_row_ids_as_kfold_does(
    api: Api, dataset: dict[str, Any], submitted: dict[str, Any]
) -> None:
    reply = api.get("submitter", f"/v1/submissions/{submitted['id']}/folds")
    assert reply.status_code == 200
    folds = reply.get_json()["folds"]
    assert [(f["repeat"], f["fold"]) for f in folds] == [(0, f) for f in range(5)]
    development = load_development_frame(api.settings, dataset["id"], columns=["row_id"])
    row_ids = development["row_id"].astype(str).to_numpy()
    tested = [rid for f in folds for rid in f["test_row_ids"]]
    # Folds are disjoint and cover the development rows exactly once; no other id appears.
    assert sorted(tested) == sorted(row_ids)
    # The vault's "kfold" plan equals scikit-learn's KFold(shuffle=True) with the plan's seed.
    plan = dataset["fold_plan"]
    expected = KFold(plan["folds"], shuffle=True, random_state=plan["seed"]).split(np.zeros(len(row_ids)))
    for fold, (_, test) in zip(folds, expected, strict=True):
        assert fold["test_row_ids"] == row_ids[test].tolist()
    assert not pd.Series(tested).str.startswith("h").any()


def test_cancel_by_owner_or_steward_and_409_once_finished(
    api: Api, dataset: dict[str, Any], submitted: dict[str, Any]
) -> None:
    path = f"/v1/submissions/{submitted['id']}"
    api.problem(api.delete("other_steward", path), 404)
    api.problem(api.delete("submitter2", path), 403)
    canceled = api.delete("submitter", path)
    assert canceled.status_code == 200 and canceled.get_json()["state"] == "canceled"
    assert canceled.get_json()["finished_at"] is not None
    api.problem(api.delete("submitter", path), 409)
    second = api.post("submitter", "/v1/submissions", json=submission_body(dataset)).get_json()
    assert api.delete("steward", f"/v1/submissions/{second['id']}").get_json()["state"] == "canceled"


def test_another_teams_submission_is_404_everywhere(api: Api, submitted: dict[str, Any]) -> None:
    for suffix in ("", "/folds"):
        theirs = api.problem(api.get("other_submitter", f"/v1/submissions/{submitted['id']}{suffix}"), 404)
        unknown = api.problem(api.get("other_submitter", f"/v1/submissions/sub_0000{suffix}"), 404)
        assert (theirs["type"], theirs["title"]) == (unknown["type"], unknown["title"])
        assert submitted["dataset"] not in theirs["detail"]


def test_a_finished_submission_has_the_documented_shape(api: Api, submitted: dict[str, Any]) -> None:
    sub_id = submitted["id"]
    path = f"/v1/submissions/{sub_id}"
    etag = api.get("submitter", path).headers["ETag"]
    # Write what the workers would: five fold rows, the summary, the one holdout score.
    submissions.mark_running(api.engine, sub_id)
    for fold in range(5):
        submissions.record_fold(api.engine, sub_id, 0, fold, status="ok", train_rows=282, test_rows=71,
                                scores={"rmse": 55.0 + fold, "r2": 0.45}, baseline_scores={"rmse": 77.0, "r2": 0.0},
                                coefficients=None, fit_seconds=0.01, score_seconds=0.001)
    stats = {"mean": 57.0, "std": 1.6, "min": 55.0, "max": 59.0, "naive_interval_95": [55.0, 59.0]}
    submissions.store_summary(api.engine, sub_id, {
        "summary": {"rmse": stats}, "baseline": {"estimator": "DummyRegressor", "summary": {"rmse": stats}},
        "coefficients": None, "provenance": {"dataset_fingerprint": "f" * 64, "config_fingerprint": "c" * 64,
                                             "fold_plan": {"scheme": "kfold"}, "versions": {"sklearn": "1"}},
    })
    submissions.store_holdout_once(api.engine, sub_id, {"rmse": 56.5123, "r2": 0.4711}, "h" * 64, 0.02)
    # What the verdict job releases (exact mode, rounded): the document shows this, never the raw score.
    holdout_releases.record(api.engine, {
        "submission_id": sub_id, "dataset_id": submitted["dataset"], "owner_key_id": row_owner(api, sub_id),
        "mode": "exact", "released": {"rmse": 56.5, "r2": 0.471}, "spent": 1, "state": {"secret": 0.123},
        "withheld_until": None})
    submissions.transition(api.engine, sub_id, "succeeded", LIVE_STATES)
    reply = api.get("submitter", path, headers={"If-None-Match": etag})
    assert reply.status_code == 200 and reply.headers["ETag"] != etag
    doc = reply.get_json()
    assert SubmissionSchema().validate(doc) == {}
    assert doc["state"] == "succeeded" and doc["progress"] == {"folds_done": 5, "folds_total": 5}
    # The keys of the submission document in ARCHITECTURE.md, all present.
    assert {"id", "dataset", "state", "progress", "created_at", "started_at", "finished_at", "error",
            "result"} <= set(doc)
    assert {"cv", "coefficients", "baseline", "holdout", "verdict", "provenance"} <= set(doc["result"])
    assert doc["result"]["cv"]["folds"][0]["scores"] == {"rmse": 55.0, "r2": 0.45}
    holdout = doc["result"]["holdout"]
    assert holdout["released"] is True and holdout["scores"] == {"rmse": 56.5, "r2": 0.471}
    text = reply.get_data(as_text=True)
    assert "h" * 64 not in text and "56.5123" not in text and "0.4711" not in text and "secret" not in text
    listed = api.get("submitter", "/v1/submissions").get_json()["submissions"]
    assert listed == [doc]
    api.problem(api.delete("submitter", path), 409)


def row_owner(api: Api, sub_id: str) -> str:
    row = submissions.get(api.engine, sub_id)
    assert row is not None
    return str(row["owner_key_id"])


def test_identical_configuration_returns_the_existing_submission(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    first = api.post("submitter", "/v1/submissions", json=submission_body(dataset))
    # Another member of the team, another label, same model + validation + metrics on the same data.
    again = api.post("submitter2", "/v1/submissions", json=submission_body(dataset, label="same thing, new name"))
    assert first.status_code == 202 and again.status_code == 200
    assert again.get_json()["id"] == first.get_json()["id"]
    assert count_submissions(api) == 1
    assert len(worker_says_ok) == 1, "the worker was asked to check the configuration again"
    changed = api.post("submitter", "/v1/submissions", json=submission_body(dataset, metrics=["r2"]))
    assert changed.status_code == 202 and count_submissions(api) == 2


def test_linear_is_read_from_the_catalog(api: Api, dataset: dict[str, Any],
                                         worker_says_ok: list[dict[str, Any]]) -> None:
    from sklearn.ensemble import RandomForestRegressor
    from sklearn.linear_model import Ridge

    # Reference: scikit-learn's fitted Ridge has coef_ (its coefficients are recorded per fold); a fitted
    # RandomForestRegressor has none.
    X, y = np.arange(8.0).reshape(4, 2), np.arange(4.0)
    assert hasattr(Ridge().fit(X, y), "coef_") and not hasattr(RandomForestRegressor(n_estimators=2).fit(X, y),
                                                                 "coef_")
    forest = {"estimator": "RandomForestRegressor", "features": ["age", "bmi"]}
    stored: dict[str, bool] = {}
    for body in (submission_body(dataset), submission_body(dataset, model=forest)):
        reply = api.post("submitter", "/v1/submissions", json=body)
        assert reply.status_code == 202, reply.get_data(as_text=True)
        row = submissions.get(api.engine, reply.get_json()["id"])
        assert row is not None
        stored[body["model"]["estimator"]] = row["config"]["linear"]
    assert stored == {"Ridge": True, "RandomForestRegressor": False}
