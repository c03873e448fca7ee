"""Write finished submissions straight into the records, as the worker chain would leave them.

The HTTP-layer tests of the review gate (board, champion, report, client) need submissions with
fold scores, a summary, a verdict and a holdout release without running a worker; the summary is
built by the worker's own ``summary_document`` so its shape is the real one.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from sqlalchemy import Engine

from service.gate.release import Release
from service.ids import new_id
from service.records import holdout_releases, submissions
from service.vocabulary import LIVE_STATES
from worker.jobs.summary import summary_document

RAW_HOLDOUT = 987.654321  # stored as the raw holdout score; must never appear in any answer


def verdict(decision: str, *, metric: str = "rmse", reasons: Sequence[str] | None = None,
            champion: str | None = None, policy_version: int = 0) -> dict[str, Any]:
    """A verdict document (``result.verdict``) with one rule per reason."""
    reasons = list(reasons or [f"the model {'beats' if decision == 'pass' else 'does not beat'} the baseline"])
    return {
        "decision": decision, "reasons": reasons,
        "rules": [{"rule": "baseline", "outcome": decision, "sentence": reasons[0], "figures": {"p_value": 0.01}},
                  {"rule": "bar", "outcome": "skipped", "sentence": "no bar is set", "figures": {}}],
        "primary_metric": metric, "test": "corrected_resampled_t", "policy_version": policy_version,
        "champion": champion,
    }


def make_submission(
    engine: Engine, dataset: dict[str, Any], owner_key_id: str, *, label: str = "", state: str = "succeeded",
    scores: Sequence[float] | None = None, baseline: Sequence[float] | None = None, metric: str = "rmse",
    decision: str | None = "pass", verdict_doc: dict[str, Any] | None = None,
    released: dict[str, float] | str | None = "auto", folds: int | None = None, repeats: int = 1,
    coefficients: dict[str, Any] | None = None, champion_id: str | None = None,
    release_with: Callable[[str], Release] | None = None, policy_version: int = 0,
) -> str:
    """Insert a submission with its folds, summary, verdict and release; return its id.

    ``scores`` are the candidate's primary-metric fold scores (None: no folds recorded, e.g. queued);
    ``released="auto"`` releases the CV mean rounded to 3 digits, None withholds the holdout;
    ``release_with`` instead gives the release mechanism's outcome for the new submission's id, recorded
    as the verdict job records it, under ``policy_version``.
    """
    plan = dataset["fold_plan"]
    n_folds = folds or (len(scores) // repeats if scores else plan["folds"])
    validation = {"scheme": plan["scheme"], "folds": n_folds, "seed": plan["seed"], "repeats": repeats,
                  "plan_overridden": n_folds != plan["folds"]}
    sub_id = new_id("sub")
    submissions.insert(engine, {
        "id": sub_id, "team": dataset["team"], "dataset_id": dataset["id"], "owner_key_id": owner_key_id,
        "label": label, "config": {
            "model": {"estimator": "Ridge", "params": {"alpha": 1.0}, "features": ["age", "bmi"], "preprocess": []},
            "validation": validation, "metrics": [metric], "label": label, "task": dataset["task"],
            "target": dataset["target"], "linear": True,
        },
        "config_fingerprint": new_id("cfg").ljust(64, "0")[:64], "folds_total": n_folds * repeats,
    })
    if scores is None:
        return sub_id
    submissions.mark_running(engine, sub_id)
    base = list(baseline) if baseline is not None else [s * 1.3 for s in scores]
    cells = [(r, f) for r in range(repeats) for f in range(n_folds)]
    for (r, f), value, value0 in zip(cells, scores, base, strict=True):
        submissions.record_fold(
            engine, sub_id, r, f, status="ok", train_rows=283, test_rows=71, scores={metric: value},
            baseline_scores={metric: value0}, coefficients=None if coefficients is None else coefficients[(r, f)],
            fit_seconds=0.01, score_seconds=0.001, error=None)
    summary = summary_document(submissions.fold_rows(engine, sub_id), cells, [metric], str(dataset["task"]))
    summary["provenance"] = {
        "dataset_fingerprint": dataset["fingerprint"], "development_fingerprint": dataset["development_fingerprint"],
        "config_fingerprint": "c" * 64, "fold_plan": validation, "versions": {"scikit-learn": "1.9.1"},
    }
    submissions.store_summary(engine, sub_id, summary)
    if state == "succeeded":
        submissions.store_holdout_once(engine, sub_id, {metric: RAW_HOLDOUT}, "h" * 64, 0.1)
        mean = summary["summary"][metric]["mean"]
        shown = {metric: round(mean, 3)} if released == "auto" else released
        row: dict[str, Any] = {"mode": "exact", "released": shown, "spent": 1, "state": {}, "withheld_until": None}
        if release_with is not None:
            outcome = release_with(sub_id)
            row = {"mode": outcome.mode, "released": outcome.released, "spent": outcome.spent,
                   "state": outcome.state, "withheld_until": outcome.withheld_until, "policy_version": policy_version}
        holdout_releases.record(engine, {
            "submission_id": sub_id, "dataset_id": dataset["id"], "owner_key_id": owner_key_id, **row})
    if decision is not None or verdict_doc is not None:
        doc = verdict_doc or verdict(str(decision), metric=metric, champion=champion_id,
                                     policy_version=policy_version)
        submissions.store_verdict(engine, sub_id, doc, doc.get("policy_version", 0), champion_id)
    if state != "running":
        submissions.transition(engine, sub_id, state, LIVE_STATES)
    return sub_id
