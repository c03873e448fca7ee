"""Give a submission its verdict once its summary and holdout are stored: release the holdout figure, then decide.

The last job of the chain (folds -> summary, and the holdout beside them -> verdict). It reads only
the records: fold rows, the stored summary and the raw holdout outcome the holdout job stored once.
A holdout attempt that failed fails the submission here, after the summary, so the failed
submission still carries its cross-validation result; so does a per-example loss file that cannot be
read, with nothing released. The release is
recorded once per submission (primary key) under a per-dataset lock, because the ladder and
thresholdout carry state from one submission to the next. The submission becomes ``succeeded``
only here, so a client that sees ``succeeded`` always finds its verdict.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from typing import Any

import numpy as np
from redis import Redis

from service.gate import review_state
from service.gate.policy import Policy, parse_policy
from service.gate.release import HoldoutScores, release
from service.gate.statistics import without_largest
from service.gate.verdict import (
    CORRECTED_RESAMPLED_T,
    FIVE_BY_TWO_CV,
    TRIMMABLE_FORMS,
    ChampionFolds,
    PlanFacts,
    TrimmedHoldout,
    judge,
    trimmed_rows,
)
from service.records import champions, holdout_releases, submissions
from service.records.engine import as_utc, utcnow
from service.submission.resolved import ValidationPlan
from service.vocabulary import LIVE_STATES
from worker.jobs.losses import DamagedLosses, load_per_example
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on

Cell = tuple[int, int]
_EPOCH = datetime(1970, 1, 1)


def give_verdict(ctx: WorkerContext, redis: Redis, submission_id: str) -> dict[str, Any]:
    """Release the holdout figure and store the verdict of one submission; idempotent."""
    engine = ctx.engine
    work = submission_to_work_on(ctx, submission_id)
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    if sub["verdict"] is not None:
        submissions.transition(engine, submission_id, "succeeded", LIVE_STATES)
        return {"submission_id": submission_id, "verdict": "already judged"}
    if sub["cv_summary"] is None:
        raise RuntimeError(f"submission {submission_id} has no cross-validation summary yet; "
                           "it is judged after the summary job")
    raw = submissions.get_holdout(engine, submission_id)
    if raw is None:
        raise RuntimeError(f"submission {submission_id} has no holdout score yet; it is judged after the holdout job")
    if raw.get("error"):
        submissions.transition(engine, submission_id, "failed", LIVE_STATES, error=str(raw["error"]))
        return {"submission_id": submission_id, "decision": None, "holdout": "not scored"}

    stated = review_state.policy_in_force(engine, dataset)
    version = int(stated["version"])
    policy = parse_policy(stated, str(dataset["task"]))
    metric = policy.primary_metric
    folds = [row for row in submissions.fold_rows(engine, submission_id) if row["status"] == "ok"]
    candidate = _cells(folds, "scores", metric)
    baseline = _cells(folds, "baseline_scores", metric)

    try:
        with redis.lock(f"sealfold:release:{dataset['id']}", timeout=120, blocking_timeout=60):
            if holdout_releases.get(engine, submission_id) is None:
                _release(ctx, sub, dataset, policy, version, raw["scores"], candidate, folds)
    except DamagedLosses as exc:
        # A retry would find the same file: fail now, with nothing released, rather than stay running.
        error = f"{exc}; nothing about the holdout was released"
        submissions.transition(engine, submission_id, "failed", LIVE_STATES, error=error)
        return {"submission_id": submission_id, "decision": None, "holdout": "not released"}

    champion_id = champions.current(engine, dataset["id"])
    champion = None if champion_id in (None, submission_id) else _champion(ctx, str(champion_id), metric)
    validation = ValidationPlan.from_document(sub["config"]["validation"])
    plan = PlanFacts(
        key=_plan_key(validation),
        sizes={(r["repeat"], r["fold"]): (r["train_rows"], r["test_rows"]) for r in folds},
        overridden=validation.plan_overridden,
        test=FIVE_BY_TWO_CV if validation.test == "5x2cv" else CORRECTED_RESAMPLED_T,
        holdout_rows=int(dataset["rows_holdout"]),
    )
    holdout_value = raw["scores"].get(metric)
    trimmed = _trimmed(ctx, dataset, submission_id, metric) if holdout_value is not None else None
    verdict = judge(policy, candidate, baseline, champion, holdout_value, plan, policy_version=version,
                    holdout_trimmed=trimmed)
    submissions.store_verdict(engine, submission_id, verdict, version, None if champion is None else champion_id)
    submissions.transition(engine, submission_id, "succeeded", LIVE_STATES)
    return {"submission_id": submission_id, "decision": verdict["decision"]}


def _trimmed(ctx: WorkerContext, dataset: Mapping[str, Any], submission_id: str, metric: str) -> TrimmedHoldout | None:
    """The holdout score without its few largest per-row losses, for the consistency rule; None if not kept."""
    form = TRIMMABLE_FORMS.get(metric)
    rows = trimmed_rows(int(dataset["rows_holdout"]))
    if form is None or rows == 0:
        return None
    try:
        values = load_per_example(ctx.settings, dataset["id"], submission_id, metric)
    except DamagedLosses:
        return None  # the release above already failed the submission on such a file
    if values is None or values.size <= rows:
        return None
    return TrimmedHoldout(without_largest(values, form, rows), rows)


def _plan_key(validation: ValidationPlan) -> tuple[str, int, int]:
    """Return the fold plan as (scheme, folds, seed): equal keys mean identical splits per repeat."""
    plan = validation.fold_plan()
    return plan.scheme, plan.folds, plan.seed


def _cells(folds: list[dict[str, Any]], column: str, metric: str) -> dict[Cell, float]:
    values = ((row["repeat"], row["fold"], (row[column] or {}).get(metric)) for row in folds)
    return {(r, f): float(v) for r, f, v in values if v is not None}


def _champion(ctx: WorkerContext, champion_id: str, metric: str) -> ChampionFolds | None:
    champ = submissions.get(ctx.engine, champion_id)
    if champ is None:
        return None
    validation = ValidationPlan.from_document(champ["config"]["validation"])
    rows = [r for r in submissions.fold_rows(ctx.engine, champion_id) if r["status"] == "ok"]
    return ChampionFolds(
        submission_id=champion_id, scores=_cells(rows, "scores", metric), plan_key=_plan_key(validation),
    )


def _release(
    ctx: WorkerContext, sub: Mapping[str, Any], dataset: Mapping[str, Any], policy: Policy, version: int,
    raw_scores: Mapping[str, float | None], candidate: Mapping[Cell, float], folds: list[dict[str, Any]],
) -> None:
    engine = ctx.engine
    values = np.array(list(candidate.values()), dtype=float)
    last = holdout_releases.latest(engine, dataset["id"])
    state: dict[str, Any] = dict(last["state"]) if last else {}
    mine = holdout_releases.list_since(engine, dataset["id"], _EPOCH, owner_key_id=sub["owner_key_id"])
    spent_at = [as_utc(r["released_at"]) or utcnow() for r in mine if r["spent"] > 0]
    holdout = HoldoutScores(
        submission_id=sub["id"],
        scores={m: float(v) for m, v in raw_scores.items() if v is not None},
        cv_mean=float(values.mean()) if values.size else float("nan"),
        cv_std=float(values.std(ddof=1)) if values.size > 1 else 0.0,
        fold_test_rows=float(np.mean([r["test_rows"] for r in folds])) if folds else 0.0,
        holdout_rows=int(dataset["rows_holdout"]),
        per_example=load_per_example(ctx.settings, dataset["id"], sub["id"], policy.primary_metric),
    )
    best_id = (state.get("ladder") or {}).get("best_submission")
    best = load_per_example(ctx.settings, dataset["id"], str(best_id), policy.primary_metric) if best_id else None
    # Fresh OS entropy for the noise of thresholdout: a seed anyone could know would undo the noise.
    outcome = release(policy, holdout, state=state, spent_at=spent_at, now=utcnow(),
                      rng=np.random.default_rng(), best_per_example=best)
    holdout_releases.record(engine, {
        "submission_id": sub["id"], "dataset_id": dataset["id"], "owner_key_id": sub["owner_key_id"],
        "mode": outcome.mode, "released": outcome.released, "spent": outcome.spent, "state": outcome.state,
        "withheld_until": outcome.withheld_until, "policy_version": version,
    })
