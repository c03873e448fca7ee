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
from sklearn.linear_model import LinearRegression, Ridge

from service.gate.online import gamma
from service.records import champion_tests, champions, holdout_releases, policies, submissions
from tests.worker.jobs.test_verdict import (  # noqa: F401
    Judged,
    diabetes,
    recorded,
    redis,
    rule,
    shuffled_diabetes,
)
from worker.jobs import losses
from worker.jobs.runtime import WorkerContext
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
