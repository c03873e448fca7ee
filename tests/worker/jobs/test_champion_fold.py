"""The champion scored on a candidate's other fold plan: equal to cross_validate on those folds, cached per plan.

Reference: scikit-learn's cross_validate of the champion's pipeline on KFold(3, shuffle=True,
random_state=11), the vault's "kfold" plan (tests/support/folds.py), on the diabetes data (Efron et
al. 2004, bundled with scikit-learn).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from redis import Redis
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold, cross_validate
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.records import champion_folds, champions, submissions
from service.submission import dispatch
from service.submission.resolved import ValidationPlan
from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from tests.worker.jobs.test_verdict import redis, rule  # noqa: F401
from worker import jobs
from worker.jobs import ALLOWED_JOBS
from worker.jobs.holdout import score_holdout
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict
from worker.process import placement


def _config(dataset: dict[str, Any], alpha: float, folds: int | None = None) -> dict[str, Any]:
    features = [c["name"] for c in dataset["columns"] if c["name"] != "target"]
    config = config_document(dataset, "Ridge", params={"alpha": alpha}, features=features, metrics=["rmse"],
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    if folds is not None:
        config["validation"].update(folds=folds, plan_overridden=True)
    return config


def _judged(ctx: WorkerContext, redis: Redis, sub_id: str, folds: int) -> None:  # noqa: F811
    run_all_folds(sub_id, folds)
    jobs.summarize(sub_id)
    score_holdout(ctx, sub_id)
    give_verdict(ctx, redis, sub_id)


def test_the_champion_is_scored_on_the_candidates_folds_and_the_comparison_is_paired(
    ctx: WorkerContext, redis: Redis  # noqa: F811
) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=11)
    champion = add_submission(ctx, dataset, _config(dataset, 0.5))
    _judged(ctx, redis, champion, 5)
    champions.promote(ctx.engine, dataset["id"], champion, "key_steward")

    config = _config(dataset, 2.0, folds=3)
    candidate = add_submission(ctx, dataset, config)
    validation = ValidationPlan.from_document(config["validation"])
    assert dispatch.champion_to_replay(ctx.engine, dataset["id"], validation) == champion
    for f in range(3):
        assert jobs.run_champion_fold(candidate, champion, 0, f)["champion_fold"] == "scored"
    assert jobs.run_champion_fold(candidate, champion, 0, 1)["champion_fold"] == "cached"
    assert dispatch.champion_to_replay(ctx.engine, dataset["id"], validation) is None  # cached for this plan
    # Same plan as the champion's own: nothing to score.
    own = ValidationPlan.from_document(_config(dataset, 3.0)["validation"])
    assert dispatch.champion_to_replay(ctx.engine, dataset["id"], own) is None

    stored = champion_folds.rows(ctx.engine, champion, "kfold-3-11")
    features = [c for c in dev.columns if c != "target"]
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(3, shuffle=True, random_state=11).split(X))
    reference = cross_validate(make_pipeline(StandardScaler(), Ridge(alpha=0.5)), X, y, cv=cv,
                               scoring="neg_root_mean_squared_error")
    assert [r["status"] for r in stored] == ["ok"] * 3
    assert [r["test_rows"] for r in stored] == [len(t) for _, t in cv]
    np.testing.assert_allclose([r["scores"]["rmse"] for r in stored], -reference["test_score"], rtol=1e-10)

    _judged(ctx, redis, candidate, 3)
    verdict = submissions.get(ctx.engine, candidate)["verdict"]  # type: ignore[index]
    on_cv = rule(verdict, "champion")
    assert on_cv["outcome"] != "inconclusive" or "Cannot compare" not in on_cv["sentence"]
    assert on_cv["figures"]["champion_on_candidate_plan"] is True and on_cv["figures"]["cells"] == 3
    assert on_cv["figures"]["champion_mean"] == pytest.approx(float(np.mean(-reference["test_score"])))


def test_a_five_by_two_cv_candidate_gets_a_paired_champion_test(ctx: WorkerContext, redis: Redis) -> None:  # noqa: F811
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=11)
    champion = add_submission(ctx, dataset, _config(dataset, 0.5))
    _judged(ctx, redis, champion, 5)
    champions.promote(ctx.engine, dataset["id"], champion, "key_steward")
    config = _config(dataset, 2.0)
    config["validation"].update(folds=2, repeats=5, test="5x2cv", plan_overridden=True)
    candidate = add_submission(ctx, dataset, config)
    for r in range(5):
        for f in range(2):
            jobs.run_champion_fold(candidate, champion, r, f)
    run_all_folds(candidate, 2, repeats=5)
    jobs.summarize(candidate)
    score_holdout(ctx, candidate)
    give_verdict(ctx, redis, candidate)
    verdict = submissions.get(ctx.engine, candidate)["verdict"]  # type: ignore[index]
    on_cv = rule(verdict, "champion")
    # Dietterich's 5x2cv t on all 10 cells, paired with the champion scored on the same splits.
    assert verdict["test"] == "five_by_two_cv" and on_cv["figures"]["test"] == "five_by_two_cv"
    assert on_cv["figures"]["cells"] == 10 and on_cv["figures"]["df"] == 5


def test_the_champion_fold_job_is_allowed_and_runs_in_a_work_horse() -> None:
    assert "worker.jobs.run_champion_fold" in ALLOWED_JOBS
    assert not placement.runs_in_process("worker.jobs.run_champion_fold")  # it fits models: never in the worker
