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
from typing import Any

import numpy as np
from redis import Redis

from service.gate import review_state
from service.gate.evidence import gather
from service.gate.policy import Policy, parse_policy
from service.gate.rejudge import holdout_spent_at, release_lock_name
from service.gate.release import HoldoutScores, release
from service.gate.verdict import judge
from service.records import holdout_releases, submissions
from service.records.engine import utcnow
from service.vocabulary import LIVE_STATES
from worker.jobs.losses import DamagedLosses, load_per_example
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on

Cell = tuple[int, int]


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
    evidence = gather(engine, sub, dataset, metric)
    candidate, folds = evidence.candidate, evidence.folds

    try:
        with redis.lock(release_lock_name(str(dataset["id"])), timeout=120, blocking_timeout=60):
            if holdout_releases.get(engine, submission_id) is None:
                _release(ctx, sub, dataset, policy, version, raw["scores"], candidate, folds)
    except DamagedLosses as exc:
        # A retry would find the same file: fail now, with nothing released, rather than stay running.
        error = f"{exc}; nothing about the holdout was released"
        submissions.transition(engine, submission_id, "failed", LIVE_STATES, error=error)
        return {"submission_id": submission_id, "decision": None, "holdout": "not released"}

    holdout_value = raw["scores"].get(metric)
    verdict = judge(policy, candidate, evidence.baseline, evidence.champion, holdout_value, evidence.plan,
                    policy_version=version)
    submissions.store_verdict(engine, submission_id, verdict, version, evidence.champion_id)
    submissions.transition(engine, submission_id, "succeeded", LIVE_STATES)
    return {"submission_id": submission_id, "decision": verdict["decision"]}


def _release(
    ctx: WorkerContext, sub: Mapping[str, Any], dataset: Mapping[str, Any], policy: Policy, version: int,
    raw_scores: Mapping[str, float | None], candidate: Mapping[Cell, float], folds: list[dict[str, Any]],
) -> None:
    engine = ctx.engine
    values = np.array(list(candidate.values()), dtype=float)
    last = holdout_releases.latest(engine, dataset["id"])
    state: dict[str, Any] = dict(last["state"]) if last else {}
    spent_at = holdout_spent_at(engine, str(dataset["id"]), str(sub["owner_key_id"]))
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
