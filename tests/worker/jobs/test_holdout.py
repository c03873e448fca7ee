"""The holdout job: refit on all development rows, score the sealed rows once, reveal nothing."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from sklearn import metrics as skm
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, StandardScaler
from sqlalchemy import func, select

from service.errors import SealBroken
from service.records import submissions
from service.records.tables import holdout_scores
from service.vault import store
from service.vocabulary import LIVE_STATES
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import holdout
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict

METRICS = ["rmse", "mae", "r2"]


def prepared(ctx: WorkerContext, config_changes: dict[str, Any] | None = None,
             dev: pd.DataFrame | None = None, hold: pd.DataFrame | None = None) -> tuple[str, dict[str, Any]]:
    """A diabetes submission (Efron et al. 2004; bundled with scikit-learn) whose folds and summary ran."""
    frame = load_diabetes(as_frame=True).frame
    dev = frame.iloc[:400] if dev is None else dev
    hold = frame.iloc[400:] if hold is None else hold
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    features = [c for c in dev.columns if c != "target"]
    options: dict[str, Any] = {"features": features, "metrics": METRICS,
                               "preprocess": [{"transformer": "StandardScaler", "columns": features}]}
    config = config_document(dataset, "Ridge", params={"alpha": 0.7}, **{**options, **(config_changes or {})})
    sub_id = add_submission(ctx, dataset, config)
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    return sub_id, dataset


def holdout_rows(ctx: WorkerContext, sub_id: str) -> int:
    with ctx.engine.connect() as conn:
        return int(conn.execute(select(func.count()).select_from(holdout_scores)
                                .where(holdout_scores.c.submission_id == sub_id)).scalar_one())


def test_holdout_scores_equal_sklearn_refit_on_development_rows(ctx: WorkerContext) -> None:
    sub_id, _ = prepared(ctx)
    answer = jobs.score_holdout(sub_id)
    assert answer == {"submission_id": sub_id, "holdout": "scored", "metrics": sorted(METRICS)}
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None
    # Reference: the same pipeline fitted by scikit-learn on the 400 development rows, scored with
    # sklearn.metrics on the 42 held-out rows.
    frame = load_diabetes(as_frame=True).frame
    X, y = frame.drop(columns="target").to_numpy(), frame["target"].to_numpy()
    model = make_pipeline(StandardScaler(), Ridge(alpha=0.7)).fit(X[:400], y[:400])
    pred = model.predict(X[400:])
    assert stored["scores"]["rmse"] == pytest.approx(skm.root_mean_squared_error(y[400:], pred), rel=1e-10)
    assert stored["scores"]["mae"] == pytest.approx(skm.mean_absolute_error(y[400:], pred), rel=1e-10)
    assert stored["scores"]["r2"] == pytest.approx(skm.r2_score(y[400:], pred), rel=1e-10)
    sub = submissions.get(ctx.engine, sub_id)
    # The verdict job, not the holdout job, finishes a submission (so "succeeded" always has a verdict).
    assert sub is not None and sub["state"] == "running" and sub["finished_at"] is None


@pytest.mark.parametrize("features", [
    ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"], ["bp", "age", "s6"],
], ids=["stored-order", "reordered-subset"])
def test_holdout_without_steps_equals_the_bare_estimator(
    ctx: WorkerContext, features: list[str]
) -> None:
    sub_id, _ = prepared(ctx, {"features": features, "preprocess": []})
    assert jobs.score_holdout(sub_id)["holdout"] == "scored"
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None
    # Reference: Ridge alone fitted by scikit-learn on the 400 development rows, scored on the 42 others.
    frame = load_diabetes(as_frame=True).frame
    X, y = frame[features].to_numpy(), frame["target"].to_numpy()
    pred = Ridge(alpha=0.7).fit(X[:400], y[:400]).predict(X[400:])
    assert stored["scores"]["rmse"] == pytest.approx(skm.root_mean_squared_error(y[400:], pred), rel=1e-10)
    assert stored["scores"]["r2"] == pytest.approx(skm.r2_score(y[400:], pred), rel=1e-10)


def test_holdout_is_scored_once_when_the_job_runs_twice(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _ = prepared(ctx)
    calls: list[int] = []
    real = holdout.predictions  # the one place the holdout job predicts on sealed rows

    def counting(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(holdout, "predictions", counting)
    opened: list[str] = []
    real_open = store.open_sealed_holdout
    monkeypatch.setattr(store, "open_sealed_holdout",
                        lambda *a, **k: opened.append(a[1]) or real_open(*a, **k))
    first = jobs.score_holdout(sub_id)
    scores = submissions.get_holdout(ctx.engine, sub_id)["scores"]  # type: ignore[index]
    second = jobs.score_holdout(sub_id)
    assert first["holdout"] == "scored" and second == {"submission_id": sub_id, "holdout": "already scored"}
    assert calls == [1] and len(opened) == 1  # the seal was opened and scored once
    assert holdout_rows(ctx, sub_id) == 1
    assert submissions.get_holdout(ctx.engine, sub_id)["scores"] == scores  # type: ignore[index]


def test_a_racing_duplicate_keeps_the_first_score(ctx: WorkerContext) -> None:
    sub_id, dataset = prepared(ctx)
    # Another run of the job stored its score between our check and our insert.
    winner = {"rmse": 1.0, "mae": 1.0, "r2": 0.0}
    submissions.store_holdout_once(ctx.engine, sub_id, winner, dataset["holdout_fingerprint"], 0.1)
    assert jobs.score_holdout(sub_id)["holdout"] == "already scored"
    assert submissions.get_holdout(ctx.engine, sub_id)["scores"] == winner  # type: ignore[index]
    assert holdout_rows(ctx, sub_id) == 1


def test_a_broken_seal_fails_the_submission(ctx: WorkerContext) -> None:
    sub_id, dataset = prepared(ctx)
    path = store.dataset_paths(ctx.settings, dataset["id"]).sealed_holdout
    tampered = pd.read_parquet(path)
    tampered.loc[0, "target"] += 1.0
    tampered.to_parquet(path, index=False)
    with pytest.raises(SealBroken):
        jobs.score_holdout(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "failed" and "fingerprint" in sub["error"]
    assert submissions.get_holdout(ctx.engine, sub_id) is None
    # Not the model's fault: the configuration gave up its key, so submitting it again runs it again.
    assert sub["config_key"] == f"reopened:{sub_id}"


def test_holdout_errors_do_not_quote_holdout_values(ctx: WorkerContext, redis_url: str) -> None:
    frame = load_diabetes(as_frame=True).frame
    frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
    frame = frame.drop(columns="sex")
    dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
    hold.loc[hold.index[0], "depot"] = "secret-depot-7"  # a category only the holdout has
    features = ["depot", "age", "bmi"]
    sub_id, _ = prepared(ctx, {"features": features, "preprocess": [
        {"transformer": "OneHotEncoder", "columns": ["depot"], "params": {"handle_unknown": "error"}}]},
        dev=dev, hold=hold)
    # scikit-learn's own message would quote the value:
    encoder = OneHotEncoder(handle_unknown="error").fit(dev[["depot"]])
    with pytest.raises(ValueError, match="secret-depot-7"):
        encoder.transform(hold[["depot"]])
    answer = jobs.score_holdout(sub_id)
    assert answer["holdout"] == "not scored"
    # The failed attempt is the submission's one holdout outcome, stored without its message ...
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None and stored["scores"] == {}
    assert "ValueError" in stored["error"] and "withheld" in stored["error"]
    assert "secret-depot-7" not in stored["error"] and "secret-depot-7" not in repr(answer)
    assert jobs.score_holdout(sub_id)["holdout"] == "already scored"  # ... and final: a retry never rescores
    assert holdout_rows(ctx, sub_id) == 1
    # The holdout job runs beside the folds and ends nothing; the verdict job releases the failure as
    # one counted query, in fixed words: no exception class, no message, no stage.
    assert submissions.get(ctx.engine, sub_id)["state"] == "running"  # type: ignore[index]
    assert give_verdict(ctx, Redis.from_url(redis_url), sub_id)["decision"] == "fail"
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "succeeded" and sub["cv_summary"] is not None
    assert sub["error"] is None and "ValueError" not in repr(sub["verdict"])
    assert "secret-depot-7" not in repr(sub)


def test_a_refit_that_fails_before_the_folds_finish_leaves_the_folds_message(ctx: WorkerContext) -> None:
    # The holdout job may run before any fold (it is queued beside them). A configuration that no
    # fit accepts must still fail with the folds' own message from the summary, as before.
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", params={"positive": True,
                                                                                 "solver": "svd"}))
    assert jobs.score_holdout(sub_id) == {"submission_id": sub_id, "holdout": "not scored"}
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None and stored["error"].startswith("refitting on all development rows failed: ValueError")
    assert submissions.get(ctx.engine, sub_id)["state"] == "queued"  # type: ignore[index]
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    assert jobs.summarize(sub_id)["folds_ok"] == 0
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "failed"
    assert sub["error"].startswith("ValueError: solver='svd' does not support positive fitting")


def test_canceled_submission_is_not_scored(ctx: WorkerContext) -> None:
    sub_id, _ = prepared(ctx)
    submissions.transition(ctx.engine, sub_id, "canceled", LIVE_STATES)
    assert jobs.score_holdout(sub_id) == {"submission_id": sub_id, "skipped": "canceled"}
    assert submissions.get_holdout(ctx.engine, sub_id) is None
