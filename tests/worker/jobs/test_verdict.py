"""The verdict job: from stored fold scores, baseline, holdout outcome and policy, the verdict and the release.

Records are written directly, as the fold, summary and holdout jobs leave them: the fold scores are
scikit-learn's own fits of Ridge and DummyRegressor on the diabetes data (Efron et al. 2004, bundled
with scikit-learn), the holdout score is scikit-learn's refit on every development row. The job runs
in-process with the session's redis-server for its release lock.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from scipy import stats
from sklearn import metrics as skm
from sklearn.base import RegressorMixin
from sklearn.datasets import load_diabetes
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, Ridge
from sklearn.model_selection import RepeatedKFold

from service.records import champions, holdout_releases, policies, submissions
from service.records.tables import holdout_scores
from service.submission.document import submission_document
from service.vault import store
from service.vocabulary import LIVE_STATES
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs import losses
from worker.jobs.runtime import WorkerContext
from worker.jobs.summary import summary_document
from worker.jobs.verdict import give_verdict

METRICS = ("rmse", "r2")


@dataclass(frozen=True)
class Judged:
    """A submission with its records written, and the numbers they were made from."""

    sub_id: str
    candidate: np.ndarray  # primary-metric (rmse) fold scores, by (repeat, fold)
    baseline: np.ndarray
    train_rows: np.ndarray
    test_rows: np.ndarray
    holdout: dict[str, float]


@pytest.fixture
def redis(redis_url: str) -> Iterator[Redis]:
    client = Redis.from_url(redis_url)
    yield client
    client.close()


def shuffled_diabetes() -> pd.DataFrame:
    """Diabetes in a seeded random order, so its last 42 rows are a random holdout as the vault draws one."""
    frame = load_diabetes(as_frame=True).frame
    return frame.iloc[np.random.default_rng(0).permutation(len(frame))].reset_index(drop=True)


@pytest.fixture
def diabetes(ctx: WorkerContext) -> dict[str, Any]:
    """Shuffled diabetes with its last 42 rows sealed as the holdout, 5 folds."""
    frame = shuffled_diabetes()
    return add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=5, seed=0)


def scores(y: np.ndarray, pred: np.ndarray) -> dict[str, float]:
    return {"rmse": float(skm.root_mean_squared_error(y, pred)), "r2": float(skm.r2_score(y, pred))}


def recorded(
    ctx: WorkerContext, dataset: dict[str, Any], model: RegressorMixin, *, folds: int = 5, repeats: int = 1,
    failed: tuple[tuple[int, int], ...] = (), validation: dict[str, Any] | None = None,
    frame: pd.DataFrame | None = None,
) -> Judged:
    """Fit ``model`` and the mean baseline on every fold with scikit-learn, and record what the jobs would.

    ``frame`` is the table the dataset was made of (default: the shuffled diabetes), development rows first.
    """
    config = config_document(dataset, "Ridge", metrics=METRICS, repeats=repeats)
    config["validation"].update({"folds": folds, **(validation or {})})
    sub_id = add_submission(ctx, dataset, config)
    submissions.mark_running(ctx.engine, sub_id)
    frame = shuffled_diabetes() if frame is None else frame
    n = int(dataset["rows_development"])
    dev, hold = frame.iloc[:n], frame.iloc[n:]
    X, y = dev.drop(columns="target").to_numpy(), dev["target"].to_numpy()
    cells = [(r, f) for r in range(repeats) for f in range(folds)]
    splits = RepeatedKFold(n_splits=folds, n_repeats=repeats, random_state=0).split(X)
    for (r, f), (train, test) in zip(cells, splits, strict=True):
        mine = scores(y[test], model.fit(X[train], y[train]).predict(X[test]))
        base = scores(y[test], DummyRegressor().fit(X[train], y[train]).predict(X[test]))
        bad = (r, f) in failed
        submissions.record_fold(
            ctx.engine, sub_id, r, f, status="failed" if bad else "ok", train_rows=len(train), test_rows=len(test),
            scores=None if bad else mine, baseline_scores=base, coefficients=None, fit_seconds=0.01,
            score_seconds=0.001, error="ValueError: the fit diverged" if bad else None)
    rows = submissions.fold_rows(ctx.engine, sub_id)
    submissions.store_summary(ctx.engine, sub_id, summary_document(rows, cells, METRICS, "regression"))
    refit = model.fit(X, y)
    holdout = scores(hold["target"].to_numpy(), refit.predict(hold.drop(columns="target").to_numpy()))
    submissions.store_holdout_once(ctx.engine, sub_id, dict(holdout), dataset["holdout_fingerprint"], 0.1)
    ok = [r for r in rows if r["status"] == "ok"]
    return Judged(sub_id, np.array([r["scores"]["rmse"] for r in ok]),
                  np.array([r["baseline_scores"]["rmse"] for r in ok]), np.array([r["train_rows"] for r in ok]),
                  np.array([r["test_rows"] for r in ok]), holdout)


def corrected_t(d: np.ndarray, n_train: float, n_test: float) -> tuple[float, float]:
    """The corrected resampled t and its one-sided p, written out from Nadeau & Bengio (2003):
    t = mean(d) / sqrt((1/J + n_test/n_train) * var(d, ddof=1)), df = J - 1, p = P(T > t) by scipy."""
    t = float(np.mean(d) / math.sqrt((1 / d.size + n_test / n_train) * np.var(d, ddof=1)))
    return t, float(stats.t.sf(t, d.size - 1))


def rule(verdict: dict[str, Any], name: str) -> dict[str, Any]:
    return next(r for r in verdict["rules"] if r["rule"] == name)


def test_the_verdict_and_the_release_are_assembled_from_the_stored_records(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    answer = give_verdict(ctx, redis, judged.sub_id)
    sub = submissions.get(ctx.engine, judged.sub_id)
    assert sub is not None and sub["state"] == "succeeded"
    verdict = sub["verdict"]
    assert answer == {"submission_id": judged.sub_id, "decision": verdict["decision"]}
    assert (verdict["primary_metric"], verdict["test"], verdict["policy_version"], verdict["champion"]) == (
        "rmse", "corrected_resampled_t", 0, None)
    assert (sub["policy_version"], sub["champion_id"]) == (0, None)

    baseline = rule(verdict, "baseline")["figures"]
    # rmse is lower-is-better, so a positive difference is the baseline's error above the candidate's.
    t, p = corrected_t(judged.baseline - judged.candidate, judged.train_rows.mean(), judged.test_rows.mean())
    assert (baseline["t"], baseline["p_one_sided"], baseline["df"]) == (pytest.approx(t), pytest.approx(p), 4)
    assert baseline["candidate_mean"] == pytest.approx(float(np.mean(judged.candidate)))
    assert baseline["baseline_mean"] == pytest.approx(float(np.mean(judged.baseline)))
    assert (baseline["n_train"], baseline["n_test"]) == (320.0, 80.0)  # 5 folds of the 400 development rows
    assert rule(verdict, "baseline")["outcome"] == ("pass" if p < 0.05 else "fail") == "pass"

    # The default ladder releases the dataset's best figure, not this submission's own, so whether its
    # own holdout score is consistent with CV (a bit about the sealed rows) is withheld, not judged.
    gap = rule(verdict, "holdout_gap")
    assert gap["outcome"] == "skipped" and gap["figures"] == {"k_std": 3.0, "floor": 0.0, "withheld": True}
    assert "withheld" in gap["sentence"] and "ladder" in gap["sentence"]
    assert [rule(verdict, n)["outcome"] for n in ("bar", "champion", "fold_stability")] == ["skipped"] * 3
    assert verdict["decision"] == "pass"
    assert f"{judged.holdout['rmse']:.6g}" not in json.dumps(verdict)  # the verdict quotes no holdout figure

    release = holdout_releases.get(ctx.engine, judged.sub_id)
    assert release is not None and (release["mode"], release["spent"]) == ("ladder", 1)
    # The first figure of the default ladder is the holdout rmse at 3 significant digits.
    assert release["released"] == {"rmse": float(f"{judged.holdout['rmse']:.3g}")}
    assert release["state"]["ladder"]["best_submission"] == judged.sub_id


def test_a_holdout_out_of_line_with_the_folds_fails_the_verdict(ctx: WorkerContext, redis: Redis) -> None:
    # Seal the 42 largest targets: a model fitted on the others misses them by far more than its folds do.
    frame = load_diabetes(as_frame=True).frame.sort_values("target", kind="stable").reset_index(drop=True)
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=5)
    # Exact release: the rule is judged on the released figure (the holdout rmse at 3 significant digits).
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "exact", "digits": 3}}, "key_steward")
    judged = recorded(ctx, dataset, Ridge(alpha=0.1), frame=frame)
    assert give_verdict(ctx, redis, judged.sub_id)["decision"] == "fail"
    verdict = submissions.get(ctx.engine, judged.sub_id)["verdict"]  # type: ignore[index]
    std = float(np.std(judged.candidate, ddof=1))
    gap = abs(judged.holdout["rmse"] - float(np.mean(judged.candidate)))
    assert gap > float(stats.t.isf(stats.norm.sf(3.0), 4)) * std * math.sqrt(1 / 5 + 80 / 320 + 80 / 42)
    assert rule(verdict, "holdout_gap")["outcome"] == "fail" and rule(verdict, "baseline")["outcome"] == "pass"
    assert verdict["reasons"][0] == rule(verdict, "holdout_gap")["sentence"]  # the failing rule is said first


def test_under_exact_release_the_holdout_rule_reads_the_released_figure(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"release": {"mode": "exact", "digits": 3}}, "key_steward")
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    verdict = submissions.get(ctx.engine, judged.sub_id)["verdict"]  # type: ignore[index]
    gap = rule(verdict, "holdout_gap")["figures"]
    # The allowance is the t prediction interval at the nominal rate 2 * (1 - Phi(3)), df J - 1 = 4, on the
    # spread of (holdout - CV mean): sqrt(1/J + n_test/n_train + n_test/n_holdout) fold std (Nadeau &
    # Bengio 2003 for the middle term; *computed* with scipy).
    std = float(np.std(judged.candidate, ddof=1))
    allowed = float(stats.t.isf(stats.norm.sf(3.0), 4)) * std * math.sqrt(1 / 5 + 80 / 320 + 80 / 42)
    assert gap["allowed_gap"] == pytest.approx(allowed) and gap["fold_std"] == pytest.approx(std)
    released = float(f"{judged.holdout['rmse']:.3g}")  # what the submitter was shown
    inside = abs(released - float(np.mean(judged.candidate))) <= allowed
    assert rule(verdict, "holdout_gap")["outcome"] == ("pass" if inside else "fail") == "pass"
    assert holdout_releases.get(ctx.engine, judged.sub_id)["spent"] == 1  # type: ignore[index]


def test_failed_folds_are_left_out_of_the_paired_test(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1), failed=((0, 3),))
    give_verdict(ctx, redis, judged.sub_id)
    figures = rule(submissions.get(ctx.engine, judged.sub_id)["verdict"], "baseline")["figures"]  # type: ignore[index]
    assert len(judged.candidate) == 4 and (figures["cells"], figures["n_differences"], figures["df"]) == (4, 4, 3)
    t, p = corrected_t(judged.baseline - judged.candidate, judged.train_rows.mean(), judged.test_rows.mean())
    assert (figures["t"], figures["p_one_sided"]) == (pytest.approx(t), pytest.approx(p))


def test_the_policy_in_force_decides_the_release_and_is_recorded(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    version = policies.put(ctx.engine, diabetes["id"], {"release": {"mode": "exact", "digits": 4},
                                                              "bar": 50.0, "max_fold_std": 100.0}, "key_steward")
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    sub = submissions.get(ctx.engine, judged.sub_id)
    assert sub is not None and sub["policy_version"] == sub["verdict"]["policy_version"] == version == 1
    release = holdout_releases.get(ctx.engine, judged.sub_id)
    assert release is not None and (release["mode"], release["policy_version"]) == ("exact", 1)
    assert release["released"] == {m: float(f"{v:.4g}") for m, v in judged.holdout.items()}
    mean = float(np.mean(judged.candidate))
    bar = rule(sub["verdict"], "bar")
    assert bar["figures"] == {"bar": 50.0, "cv_mean": pytest.approx(mean)}
    assert bar["outcome"] == ("pass" if mean <= 50.0 else "fail") == "fail"  # Ridge on diabetes: rmse about 55
    assert rule(sub["verdict"], "fold_stability")["figures"]["fold_std"] == pytest.approx(
        float(np.std(judged.candidate, ddof=1)))
    assert sub["verdict"]["decision"] == "fail"


def test_a_worse_model_under_the_ladder_is_shown_the_best_so_far_and_never_as_its_own(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    best = recorded(ctx, diabetes, Ridge(alpha=0.1))
    worse = recorded(ctx, diabetes, Ridge(alpha=1000.0))  # shrunk towards the mean: a worse holdout rmse
    # scikit-learn's own holdout rmse of the two refits: the second cannot beat the first, so the ladder stays.
    assert worse.holdout["rmse"] > best.holdout["rmse"]
    for judged in (best, worse):
        give_verdict(ctx, redis, judged.sub_id)
    # The default ladder releases its first figure at 3 significant digits and keeps it while nothing beats it.
    shown = float(f"{best.holdout['rmse']:.3g}")
    assert shown != float(f"{worse.holdout['rmse']:.3g}")
    first, second = (submission_document(ctx.engine, submissions.get(ctx.engine, j.sub_id) or {})["result"]["holdout"]
                     for j in (best, worse))
    assert first["ladder"] == {"metric": "rmse", "new_best": True, "best_so_far": shown, "held_by": best.sub_id}
    assert first["summary"].startswith(f"new best: rmse {shown:g} ") and first["policy_version"] == 0
    assert second["ladder"] == {"metric": "rmse", "new_best": False, "best_so_far": shown, "held_by": best.sub_id}
    assert second["summary"].startswith(f"no new best (best so far rmse {shown:g}, held by {best.sub_id})")
    assert f"{worse.holdout['rmse']:.3g}" not in json.dumps(second)  # the worse model's own figure never leaves
    # The holder named to the second is one whose own document already said it set the best.
    assert first["ladder"]["new_best"] and second["ladder"]["held_by"] == best.sub_id


def test_the_champion_in_force_is_compared_on_the_shared_folds(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"champion_margin": 1.5}, "key_steward")
    champion = recorded(ctx, diabetes, LinearRegression())
    give_verdict(ctx, redis, champion.sub_id)
    champions.promote(ctx.engine, diabetes["id"], champion.sub_id, "key_steward")
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    sub = submissions.get(ctx.engine, judged.sub_id)
    assert sub is not None and sub["champion_id"] == sub["verdict"]["champion"] == champion.sub_id
    figures = rule(sub["verdict"], "champion")["figures"]
    # Non-inferiority: the same corrected t on (champion rmse - candidate rmse) + margin.
    d = champion.candidate - judged.candidate
    t, p = corrected_t(d + 1.5, judged.train_rows.mean(), judged.test_rows.mean())
    assert (figures["t"], figures["p_one_sided"]) == (pytest.approx(t), pytest.approx(p))
    assert figures["mean_difference"] == pytest.approx(float(np.mean(d)))
    assert figures["champion_mean"] == pytest.approx(float(np.mean(champion.candidate)))
    assert p < 0.05 and rule(sub["verdict"], "champion")["outcome"] == "pass"
    # The champion's own verdict was judged before it was promoted: against no champion.
    assert submissions.get(ctx.engine, champion.sub_id)["champion_id"] is None  # type: ignore[index]


def test_a_champion_on_another_fold_plan_cannot_be_compared(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    champion = recorded(ctx, diabetes, LinearRegression(), folds=4, validation={"plan_overridden": True})
    champions.promote(ctx.engine, diabetes["id"], champion.sub_id, "key_steward")
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    verdict = submissions.get(ctx.engine, judged.sub_id)["verdict"]  # type: ignore[index]
    assert rule(verdict, "champion")["outcome"] == "inconclusive"
    assert rule(verdict, "champion")["figures"]["champion_plan"] == ["kfold", 4, 0]
    assert verdict["decision"] == "inconclusive"


def test_five_by_two_cv_is_judged_by_dietterichs_t(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1), folds=2, repeats=5, validation={"test": "5x2cv"})
    give_verdict(ctx, redis, judged.sub_id)
    verdict = submissions.get(ctx.engine, judged.sub_id)["verdict"]  # type: ignore[index]
    assert verdict["test"] == "five_by_two_cv"
    # Dietterich (1998): t = p_1^(1) / sqrt(mean_i s_i^2), s_i^2 = sum_j (p_i^(j) - mean_j p_i^(j))^2, df 5.
    p = (judged.baseline - judged.candidate).reshape(5, 2)
    s2 = ((p - p.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    t = float(p[0, 0] / math.sqrt(s2.mean()))
    figures = rule(verdict, "baseline")["figures"]
    assert (figures["t"], figures["df"]) == (pytest.approx(t), 5)
    assert figures["p_one_sided"] == pytest.approx(float(stats.t.sf(t, 5)))


def test_judging_waits_for_summary_and_holdout_and_then_runs_once(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    config = config_document(diabetes, "Ridge", metrics=METRICS)
    early = add_submission(ctx, diabetes, config)
    with pytest.raises(RuntimeError, match="no cross-validation summary yet"):
        give_verdict(ctx, redis, early)
    submissions.store_summary(ctx.engine, early, {"summary": {}})
    with pytest.raises(RuntimeError, match="no holdout score yet"):
        give_verdict(ctx, redis, early)
    assert holdout_releases.get(ctx.engine, early) is None

    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    give_verdict(ctx, redis, judged.sub_id)
    first = submissions.get(ctx.engine, judged.sub_id)
    release = holdout_releases.get(ctx.engine, judged.sub_id)
    assert give_verdict(ctx, redis, judged.sub_id) == {"submission_id": judged.sub_id, "verdict": "already judged"}
    again = submissions.get(ctx.engine, judged.sub_id)
    assert first is not None and again is not None and again["verdict"] == first["verdict"]
    assert holdout_releases.get(ctx.engine, judged.sub_id) == release
    assert len(holdout_releases.list_since(ctx.engine, diabetes["id"], release["released_at"])) == 1  # type: ignore[index]


def test_a_failed_holdout_attempt_is_one_counted_query_told_in_fixed_words(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    with ctx.engine.begin() as conn:  # the one stored outcome is a failure instead of the scores
        conn.execute(holdout_scores.update().where(holdout_scores.c.submission_id == judged.sub_id).values(
            scores={}, error="scoring on the holdout failed with ValueError; its message is withheld"))
    assert give_verdict(ctx, redis, judged.sub_id)["decision"] == "fail"
    sub = submissions.get(ctx.engine, judged.sub_id)
    # Judged, not failed: the failure is the model's own and part of its result, and the state is the
    # same as when the figure is withheld; the operators' text stays in the records.
    assert sub is not None and sub["state"] == "succeeded" and sub["error"] is None
    gap = rule(sub["verdict"], "holdout_gap")
    assert gap["outcome"] == "fail" and "did not produce a figure" in gap["sentence"]
    assert "ValueError" not in json.dumps(sub["verdict"])
    release = holdout_releases.get(ctx.engine, judged.sub_id)
    assert release is not None and (release["outcome"], release["spent"], release["released"]) == ("failed", 1, None)
    shown = json.dumps(submission_document(ctx.engine, sub))
    assert "ValueError" not in shown and "did not produce a figure" in shown


def test_a_damaged_loss_file_fails_the_submission_and_releases_nothing(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]
) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    losses.save_per_example(ctx.settings, diabetes["id"], judged.sub_id, {"rmse": np.ones(42)})
    kept = store.dataset_paths(ctx.settings, diabetes["id"]).sealed_holdout.parent / "per_example"
    path = kept / f"{judged.sub_id}.npz"
    path.write_bytes(path.read_bytes()[:40])  # cut short, as a full disk or a crash mid-copy leaves it
    answer = give_verdict(ctx, redis, judged.sub_id)
    assert answer == {"submission_id": judged.sub_id, "decision": None, "holdout": "not released"}
    sub = submissions.get(ctx.engine, judged.sub_id)
    assert sub is not None and sub["state"] == "failed" and sub["verdict"] is None
    assert "per-example holdout losses" in sub["error"] and judged.sub_id in sub["error"]
    assert "nothing about the holdout was released" in sub["error"]
    assert holdout_releases.get(ctx.engine, judged.sub_id) is None
    assert sub["config_key"] == f"reopened:{judged.sub_id}"  # an infrastructure failure: it may run again


def test_a_canceled_submission_is_not_judged(ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]) -> None:
    judged = recorded(ctx, diabetes, Ridge(alpha=0.1))
    submissions.transition(ctx.engine, judged.sub_id, "canceled", LIVE_STATES)
    assert give_verdict(ctx, redis, judged.sub_id) == {"submission_id": judged.sub_id, "skipped": "canceled"}
    assert submissions.get(ctx.engine, judged.sub_id)["verdict"] is None  # type: ignore[index]
    assert holdout_releases.get(ctx.engine, judged.sub_id) is None


def test_one_extreme_holdout_row_is_set_aside_by_the_consistency_rule(ctx: WorkerContext, redis: Redis) -> None:
    # Shuffled diabetes (bundled with scikit-learn) with one sealed target moved far out (25 times the largest):
    # the holdout rmse is far outside the folds' interval, but not without that row's squared error, which
    # the verdict job reads from the kept per-row losses (trimmed_rows(42) = 1).
    frame = shuffled_diabetes()
    frame.loc[420, "target"] = 25 * frame["target"].max()
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=5, seed=0)
    # Exact release: the rule is judged beside the submission's own released figure (under the ladder it is withheld).
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "exact", "digits": 3}}, "key_steward")
    with_losses = recorded(ctx, dataset, Ridge(alpha=0.1), frame=frame)
    model = Ridge(alpha=0.1).fit(frame.iloc[:400].drop(columns="target"), frame["target"].iloc[:400])
    hold = frame.iloc[400:]
    squared = (hold["target"].to_numpy() - model.predict(hold.drop(columns="target"))) ** 2
    assert math.sqrt(squared.mean()) == pytest.approx(with_losses.holdout["rmse"])  # the per-row losses of rmse
    losses.save_per_example(ctx.settings, dataset["id"], with_losses.sub_id, {"rmse": squared})
    give_verdict(ctx, redis, with_losses.sub_id)
    gap = rule(submissions.get(ctx.engine, with_losses.sub_id)["verdict"], "holdout_gap")  # type: ignore[index]
    assert gap["outcome"] == "pass" and gap["figures"]["rows_set_aside"] == 1
    assert "once its 1 largest per-row loss(es) are set aside" in gap["sentence"]
    # The same submission without kept losses: nothing to set aside, the rule fails.
    bare = recorded(ctx, dataset, Ridge(alpha=0.05), frame=frame)
    give_verdict(ctx, redis, bare.sub_id)
    assert rule(submissions.get(ctx.engine, bare.sub_id)["verdict"], "holdout_gap")["outcome"] == "fail"  # type: ignore[index]
