"""Summary (fan-in): fold statistics, coefficient stability, baseline, failures."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from sklearn.datasets import load_diabetes, load_iris

from service.catalog.metrics import METRICS
from service.records import submissions
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.jobs.summary import coefficient_summary, describe, summary_document


def test_describe_uses_sample_std_and_a_t_interval() -> None:
    values = [0.80, 0.85, 0.90, 0.82, 0.88]
    out = describe(values)
    # Reference: numpy sample std (ddof=1), and scipy's t interval mean +/- t(0.975, 4) * s / sqrt(5).
    s = float(np.std(values, ddof=1))
    low, high = stats.t.interval(0.95, df=4, loc=np.mean(values), scale=s / math.sqrt(5))
    assert out["n"] == 5 and out["mean"] == pytest.approx(0.85)
    assert out["std"] == pytest.approx(s) and out["std"] != pytest.approx(float(np.std(values)))
    assert out["naive_interval_95"] == pytest.approx([low, high])
    assert out["min"] == 0.80 and out["max"] == 0.90
    # computed (numpy/scipy): t(0.975, 4) = 2.776445, s = 0.0412311 -> half width 0.0511951
    assert out["std"] == pytest.approx(0.0412311, abs=1e-7)
    assert (high - low) / 2 == pytest.approx(0.0511951, abs=1e-7)


def test_describe_edge_cases() -> None:
    assert describe([]) == {"n": 0, "mean": None, "std": None, "min": None, "max": None,
                            "naive_interval_95": None}
    one = describe([0.5, None])
    assert one["n"] == 1 and one["mean"] == 0.5 and one["std"] is None and one["naive_interval_95"] is None


def test_intervals_on_real_folds_are_clipped_to_the_metric_range(ctx: WorkerContext) -> None:
    # scikit-learn's iris with a nearest-neighbours classifier: fold accuracies of 1.0 and 0.93-0.97,
    # fold log losses from 0.03 to 1.29, so the symmetric t-interval leaves [0, 1] and [0, inf).
    frame = load_iris(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[5:], frame.iloc[:5], "target", "classification", scheme="stratified",
                          folds=5, seed=0)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "KNeighborsClassifier",
                                                          metrics=["accuracy", "log_loss"]))
    for f in range(5):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    summary = sub["cv_summary"]["summary"]
    scores = {m: np.asarray([r["scores"][m] for r in submissions.fold_rows(ctx.engine, sub_id)])
              for m in ("accuracy", "log_loss")}
    # Reference by hand (numpy, scipy.stats.t.ppf): mean +/- t(0.975, 4) * s / sqrt(5), then clipped.
    naive = {}
    for m, x in scores.items():
        half = stats.t.ppf(0.975, len(x) - 1) * np.std(x, ddof=1) / math.sqrt(len(x))
        naive[m] = (float(np.mean(x) - half), float(np.mean(x) + half))
    assert 1.0 in scores["accuracy"] and naive["accuracy"][1] > 1.0  # the naive interval leaves the range
    assert naive["log_loss"][0] < 0.0
    assert summary["accuracy"]["naive_interval_95"] == pytest.approx([naive["accuracy"][0], 1.0])
    assert summary["log_loss"]["naive_interval_95"] == pytest.approx([0.0, naive["log_loss"][1]])
    assert summary["accuracy"]["clipped"] is True and summary["log_loss"]["clipped"] is True
    assert summary["accuracy"]["mean"] == pytest.approx(float(np.mean(scores["accuracy"])))
    # The majority-class baseline scores about 1/3 on every fold: its interval stays inside [0, 1].
    baseline = sub["cv_summary"]["baseline"]["summary"]["accuracy"]
    low, high = baseline["naive_interval_95"]
    assert baseline["clipped"] is False and 0.0 < low <= high < 1.0


def test_every_metric_declares_its_range() -> None:
    # Ranges from the definitions (scikit-learn's metric docs): scores in [0, 1], losses and errors
    # at least 0 with no ceiling, r2 and explained variance at most 1 with no floor, Matthews in [-1, 1].
    ranges = {m: spec.bounds for m, spec in METRICS.items()}
    assert ranges == {"accuracy": (0.0, 1.0), "balanced_accuracy": (0.0, 1.0), "f1": (0.0, 1.0),
                      "precision": (0.0, 1.0), "recall": (0.0, 1.0), "average_precision": (0.0, 1.0),
                      "matthews_corrcoef": (-1.0, 1.0),
                      "roc_auc": (0.0, 1.0), "brier": (0.0, 1.0), "log_loss": (0.0, None), "mse": (0.0, None),
                      "rmse": (0.0, None), "mae": (0.0, None), "r2": (None, 1.0), "explained_variance": (None, 1.0),
                      "median_absolute_error": (0.0, None), "mape": (0.0, None), "pinball_loss": (0.0, None),
                      "poisson_deviance": (0.0, None), "gamma_deviance": (0.0, None),
                      "tweedie_deviance": (0.0, None)}


def _fold(values: list[float], names: list[str] | None = None) -> dict[str, object]:
    return {"names": names or ["a", "b", "c"], "outputs": ["y"], "values": [values], "intercept": [1.0]}


def test_sign_stability() -> None:
    summary = coefficient_summary([_fold([1.0, -2.0, 0.0]), _fold([2.0, 1.0, 0.5]), _fold([0.5, -1.0, 1.0])])
    assert summary is not None
    terms = {t["name"]: t for t in summary["terms"]}
    assert terms["a"]["sign_stable"] is True and terms["a"]["mean"] == pytest.approx(3.5 / 3)
    assert terms["b"]["sign_stable"] is False  # changes sign across folds
    assert terms["c"]["sign_stable"] is False  # exactly zero in one fold
    assert terms["a"]["std"] == pytest.approx(float(np.std([1.0, 2.0, 0.5], ddof=1)))
    assert summary["intercept"][0]["mean"] == 1.0


def test_coefficients_align_by_name() -> None:
    # A category absent from one fold's training rows has no coefficient there.
    summary = coefficient_summary([_fold([1.0, 2.0], ["x", "depot_A"]), _fold([1.5, 3.0, 4.0], ["x", "depot_A",
                                                                                                  "depot_B"])])
    assert summary is not None
    terms = {t["name"]: t for t in summary["terms"]}
    assert terms["depot_B"]["values"] == [None, 4.0] and terms["depot_B"]["sign_stable"] is False
    assert terms["x"]["values"] == [1.0, 1.5] and terms["x"]["sign_stable"] is True


def test_missing_folds_count_as_failures() -> None:
    rows = [{"repeat": 0, "fold": 0, "status": "ok", "scores": {"mse": 1.0}, "baseline_scores": {"mse": 2.0},
             "coefficients": None, "error": None},
            {"repeat": 0, "fold": 2, "status": "failed", "scores": None, "baseline_scores": {"mse": 2.5},
             "coefficients": None, "error": "ValueError: boom"}]
    doc = summary_document(rows, [(0, 0), (0, 1), (0, 2)], ["mse"], "regression")
    assert [(f["fold"], f["error"][:10]) for f in doc["failures"]] == [(1, "no result "), (2, "ValueError")]
    assert doc["summary"]["mse"]["n"] == 1
    # The baseline is summarised on the candidate's successful folds only (paired).
    assert doc["baseline"]["summary"]["mse"]["mean"] == 2.0 and doc["baseline"]["estimator"] == "DummyRegressor"


def test_summarize_stores_the_summary(ctx: WorkerContext) -> None:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=4, seed=2)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Lasso", metrics=["rmse", "r2"]))
    for f in range(4):
        jobs.run_fold(sub_id, 0, f)
    answer = jobs.summarize(sub_id)
    assert answer == {"submission_id": sub_id, "folds_ok": 4, "folds_failed": 0}
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "running"
    result = sub["cv_summary"]
    rows = submissions.fold_rows(ctx.engine, sub_id)
    r2 = [r["scores"]["r2"] for r in rows]
    assert result["summary"]["r2"]["mean"] == pytest.approx(float(np.mean(r2)))
    assert result["summary"]["r2"]["std"] == pytest.approx(float(np.std(r2, ddof=1)))
    assert "naive" in result["statistics"]["naive_interval_95"]
    assert len(result["coefficients"]["terms"]) == 10
    assert result["baseline"]["summary"]["r2"]["mean"] < 0.05  # the mean predictor explains ~nothing
    assert result["provenance"]["fold_plan"] == {"scheme": "kfold", "folds": 4, "seed": 2, "repeats": 1}
    assert result["provenance"]["versions"]["scikit-learn"]


def test_all_folds_failed_fails_the_submission_with_the_estimators_message(ctx: WorkerContext) -> None:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    config = config_document(dataset, "Ridge", params={"positive": True, "solver": "svd"})
    sub_id = add_submission(ctx, dataset, config)
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    assert jobs.summarize(sub_id)["folds_ok"] == 0
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "failed" and sub["finished_at"] is not None
    assert sub["error"].startswith("ValueError: solver='svd' does not support positive fitting")
    assert len(sub["cv_summary"]["failures"]) == 3
    assert sub["config_key"] is None or not sub["config_key"].startswith("reopened:")  # its own fault: kept
    assert jobs.score_holdout(sub_id) == {"submission_id": sub_id, "skipped": "failed"}


def test_every_fold_lost_is_the_infrastructures_failure_and_the_configuration_may_run_again(
    ctx: WorkerContext,
) -> None:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge"))
    assert jobs.summarize(sub_id)["folds_ok"] == 0  # no fold job ever recorded a result
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "failed" and sub["failure_cause"] == "crash"
    assert "3 of 3 folds were lost" in sub["error"] and "no verdict is given on a partial plan" in sub["error"]
    assert sub["config_key"] == f"reopened:{sub_id}"
