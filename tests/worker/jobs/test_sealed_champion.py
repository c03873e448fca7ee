"""The verdict job's champion decision on the sealed rows: made once, paid from the budget, only outcome and level out.

Fold and holdout records are written as the jobs leave them (tests/worker/jobs/test_verdict.py's
helpers: scikit-learn's own fits on the diabetes data, Efron et al. 2004, bundled with scikit-learn),
plus the per-row squared errors the holdout job keeps for rmse.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from redis import Redis
from scipy import stats as sps
from sklearn.base import RegressorMixin
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge
from sklearn.metrics import roc_auc_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.gate.online import gamma
from service.gate.policy import parse_policy
from service.records import champion_tests, champions, holdout_releases, policies, submissions
from tests.support.folds import run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from tests.worker.jobs.test_verdict import (  # noqa: F401
    Judged,
    diabetes,
    recorded,
    redis,
    rule,
    shuffled_diabetes,
)
from worker import jobs
from worker.jobs import losses
from worker.jobs.runtime import WorkerContext
from worker.jobs.sealed_champion import _sealed
from worker.jobs.verdict import give_verdict


def kept(
    ctx: WorkerContext, dataset: dict[str, Any], model: RegressorMixin, **kwargs: Any,
) -> tuple[Judged, np.ndarray]:
    """Record a submission and keep its per-row squared errors on the sealed rows, as the holdout job does."""
    judged = recorded(ctx, dataset, model, **kwargs)
    frame = shuffled_diabetes()
    n = int(dataset["rows_development"])
    dev, hold = frame.iloc[:n], frame.iloc[n:]
    fit = model.fit(dev.drop(columns="target").to_numpy(), dev["target"].to_numpy())
    sq = np.square(hold["target"].to_numpy() - fit.predict(hold.drop(columns="target").to_numpy()))
    losses.save_per_example(ctx.settings, dataset["id"], judged.sub_id, {"rmse": sq})
    return judged, sq


def test_the_decision_is_made_once_at_the_lord_level_and_counted(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]  # noqa: F811
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"champion_margin": 5.0}, "key_steward")
    champion, champ_sq = kept(ctx, diabetes, LinearRegression())
    give_verdict(ctx, redis, champion.sub_id)
    assert champion_tests.get(ctx.engine, champion.sub_id) is None  # no champion yet: no query
    assert holdout_releases.get(ctx.engine, champion.sub_id)["spent"] == 1  # type: ignore[index]
    champions.promote(ctx.engine, diabetes["id"], champion.sub_id, "key_steward")

    judged, sq = kept(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    verdict = submissions.get(ctx.engine, judged.sub_id)["verdict"]  # type: ignore[index]
    entry = rule(verdict, "champion_holdout")
    # Delta-method t of the rmse difference plus the margin, written out: u = e_h/(2 r_h) - e_c/(2 r_c).
    rc, rh = math.sqrt(sq.mean()), math.sqrt(champ_sq.mean())
    u = champ_sq / (2 * rh) - sq / (2 * rc)
    p = float(sps.t.sf((rh - rc + 5.0) / (u.std(ddof=1) / math.sqrt(u.size)), u.size - 1))
    level = 0.025 * gamma(1)  # LORD++'s first level, W0 = alpha / 2 (Ramdas et al. 2017)
    assert entry["figures"]["level"] == pytest.approx(level) and entry["figures"]["stream_index"] == 1
    assert p < level and entry["outcome"] == "pass"  # Ridge(0.1) is within 5 rmse units of least squares
    assert entry["figures"]["decides"] is True
    assert not {"estimate", "t", "p_value", "p_one_sided", "standard_error"} & set(entry["figures"])
    # One more holdout query: the release row spent two units (the figure and the decision).
    assert holdout_releases.get(ctx.engine, judged.sub_id)["spent"] == 2  # type: ignore[index]
    row = champion_tests.get(ctx.engine, judged.sub_id)
    assert row is not None and (row["seq"], row["passed"]) == (1, entry["outcome"] == "pass")

    # A retried verdict job finds the decision: no second test, no second level.
    give_verdict(ctx, redis, judged.sub_id)
    assert champion_tests.stream(ctx.engine, diabetes["id"]).tests == 1

    again, _ = kept(ctx, diabetes, Ridge(alpha=1.0))
    give_verdict(ctx, redis, again.sub_id)
    second = rule(submissions.get(ctx.engine, again.sub_id)["verdict"], "champion_holdout")  # type: ignore[index]
    expected = 0.025 * gamma(2) + (0.025 * gamma(1) if row["passed"] else 0.0)
    assert second["figures"]["stream_index"] == 2 and second["figures"]["level"] == pytest.approx(expected)


def test_without_budget_no_decision_is_made_and_the_stream_does_not_advance(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]  # noqa: F811
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"champion_margin": 3.0, "release": {"budget": 1}}, "key_steward")
    champion, _ = kept(ctx, diabetes, LinearRegression())
    give_verdict(ctx, redis, champion.sub_id)
    champions.promote(ctx.engine, diabetes["id"], champion.sub_id, "key_steward")
    judged, _ = kept(ctx, diabetes, Ridge(alpha=0.1))  # the same submitter key: its one release is spent
    give_verdict(ctx, redis, judged.sub_id)
    entry = rule(submissions.get(ctx.engine, judged.sub_id)["verdict"], "champion_holdout")  # type: ignore[index]
    assert entry["outcome"] == "inconclusive" and "budget is spent" in entry["sentence"]
    assert entry["figures"]["level"] is None
    assert holdout_releases.get(ctx.engine, judged.sub_id)["spent"] == 0  # type: ignore[index]
    assert champion_tests.stream(ctx.engine, diabetes["id"]).tests == 0


def test_roc_auc_is_decided_by_a_paired_bootstrap_over_what_the_holdout_job_kept(
    ctx: WorkerContext, redis: Redis  # noqa: F811
) -> None:
    # Breast cancer (Wolberg et al. 1995, bundled with scikit-learn), shuffled, labels as text so the kept
    # arrays exercise the no-pickle path; reference: scikit-learn's roc_auc_score of the same refits.
    frame = load_breast_cancer(as_frame=True).frame
    frame = frame.iloc[np.random.default_rng(0).permutation(len(frame))].reset_index(drop=True)
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    frame["target"] = np.where(frame["target"] == 1, "benign", "malignant").astype(object)
    features = [c for c in frame.columns if c != "target"][:6]
    frame = frame[[*features, "target"]]
    dev, hold = frame.iloc[:450], frame.iloc[450:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=3, seed=0)
    policies.put(ctx.engine, dataset["id"], {"primary_metric": "roc_auc", "champion_online": "none"}, "key_steward")

    def submit(c: float) -> str:
        config = config_document(dataset, "LogisticRegression", params={"C": c, "max_iter": 2000}, features=features,
                                 metrics=["roc_auc"], preprocess=[{"transformer": "StandardScaler",
                                                                   "columns": features}])
        sub_id = add_submission(ctx, dataset, config)
        run_all_folds(sub_id, 3)
        jobs.summarize(sub_id)
        jobs.score_holdout(sub_id)
        give_verdict(ctx, redis, sub_id)
        return sub_id

    champion = submit(1.0)
    champions.promote(ctx.engine, dataset["id"], champion, "key_steward")
    candidate = submit(0.01)
    entry = rule(submissions.get(ctx.engine, candidate)["verdict"], "champion_holdout")  # type: ignore[index]
    assert entry["figures"]["test"] == "paired_bootstrap" and entry["figures"]["level"] == 0.05
    assert entry["outcome"] in ("pass", "fail")

    stated = policies.current(ctx.engine, dataset["id"])
    assert stated is not None
    policy = parse_policy(stated[1], "classification")
    scoring = _sealed(ctx, dataset, policy, candidate, champion)
    assert scoring is not None and scoring[2] is not None
    mine, theirs = scoring[2](np.arange(len(hold)))
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    expected = [roc_auc_score(hold["target"] == "malignant",
                              make_pipeline(StandardScaler(), LogisticRegression(C=c, max_iter=2000)).fit(X, y)
                              .predict_proba(hold[features].to_numpy())[:, 1]) for c in (0.01, 1.0)]
    assert (mine, theirs) == (pytest.approx(expected[0], rel=1e-9), pytest.approx(expected[1], rel=1e-9))


def test_when_the_folds_decide_no_holdout_query_is_spent(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]  # noqa: F811
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"champion_margin": 5.0, "champion_rule": "cv"}, "key_steward")
    champion, _ = kept(ctx, diabetes, LinearRegression())
    give_verdict(ctx, redis, champion.sub_id)
    champions.promote(ctx.engine, diabetes["id"], champion.sub_id, "key_steward")
    judged, _ = kept(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    entry = rule(submissions.get(ctx.engine, judged.sub_id)["verdict"], "champion_holdout")  # type: ignore[index]
    assert entry["outcome"] == "skipped" and entry["figures"]["decides"] is False
    assert champion_tests.get(ctx.engine, judged.sub_id) is None
    assert holdout_releases.get(ctx.engine, judged.sub_id)["spent"] == 1  # type: ignore[index]
