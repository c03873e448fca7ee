"""Give a submission its verdict once its summary and holdout are stored: release the holdout figure, then decide.

The last job of the chain (folds -> summary, and the holdout beside them -> verdict). It reads only
the records: fold rows, the stored summary and the raw holdout outcome the holdout job stored once.
A holdout attempt that failed is released like a score: one counted query, told in fixed words when
the budget allows (the holdout rule then fails) and withheld like a figure when it does not, so the
submission's state and shape are the same whatever failed and why. A per-example loss file that
cannot be read fails the submission, with nothing released (an infrastructure failure: the
configuration may run again). The holdout rule reads only the release. The champion decision on the
sealed rows (``worker.jobs.sealed_champion``) is made in the same lock, one more query paid from the
same budget; the champion's folds on the candidate's plan (``worker.jobs.champion_fold``) keep the CV
comparison paired. The release is
recorded once per submission (primary key) under a per-dataset lock, because the ladder and
thresholdout carry state from one submission to the next. The submission becomes ``succeeded``
only here, so a client that sees ``succeeded`` always finds its verdict.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import timedelta
from typing import Any

import numpy as np
from redis import Redis

from service.gate import review_state, timing
from service.gate.evidence import gather, holdout_reading
from service.gate.policy import Policy, parse_policy
from service.gate.rejudge import release_lock_name
from service.gate.release import HoldoutScores, budget_status, release
from service.gate.statistics import without_largest
from service.gate.verdict import TRIMMABLE_FORMS, TrimmedHoldout, judge, trimmed_rows
from service.records import champions, holdout_claims, holdout_releases, keys, submissions
from service.records.engine import as_utc, utcnow
from service.vocabulary import LIVE_STATES
from worker.jobs import sealed_champion
from worker.jobs.losses import DamagedLosses, load_per_example
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on

Cell = tuple[int, int]
# How often a verdict waiting for the dataset's release lock tries again. The lock is held for a few ms
# (the release and its records); redis-py's default of 0.1 s left a worker idle for most of that 0.1 s
# whenever two verdicts on one dataset met, which a burst's verdicts on two workers did one time in four.
LOCK_POLL_SECONDS = 0.005


def give_verdict(ctx: WorkerContext, redis: Redis, submission_id: str) -> dict[str, Any]:
    """Release the holdout figure and store the verdict of one submission; idempotent."""
    engine = ctx.engine
    work = submission_to_work_on(ctx, submission_id)
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    if sub["verdict"] is not None:
        # A retry after the verdict was stored: finish it at the publication time stored with it.
        submissions.transition(engine, submission_id, "succeeded", LIVE_STATES,
                               published_at=as_utc(sub.get("published_at")))
        return {"submission_id": submission_id, "verdict": "already judged"}
    if sub["cv_summary"] is None:
        raise RuntimeError(f"submission {submission_id} has no cross-validation summary yet; "
                           "it is judged after the summary job")
    raw = submissions.get_holdout(engine, submission_id)
    if raw is None:
        raise RuntimeError(f"submission {submission_id} has no holdout score yet; it is judged after the holdout job")

    stated = review_state.policy_in_force(engine, dataset)
    version = int(stated["version"])
    policy = parse_policy(stated, str(dataset["task"]))
    metric = policy.primary_metric
    evidence = gather(engine, sub, dataset, metric)
    candidate, folds = evidence.candidate, evidence.folds
    champion_id = champions.current(engine, dataset["id"])
    # Shown at a time fixed before the seal was opened, so no time a submitter reads tells the sealed step's
    # duration; a verdict late because of that step is counted as one more query (service.gate.timing).
    prompt, deadline = holdout_claims.times(engine, submission_id)
    shown = timing.moment(prompt=prompt, deadline=deadline, ready=utcnow(), scored=as_utc(raw["scored_at"]),
                          summarized=as_utc(sub.get("summarized_at")), pad_seconds=ctx.settings.holdout_pad_seconds,
                          prompt_pad_seconds=ctx.settings.holdout_prompt_seconds)
    published = shown.at

    try:
        with redis.lock(release_lock_name(str(dataset["id"])), timeout=120, blocking_timeout=60,
                        sleep=LOCK_POLL_SECONDS):
            told = holdout_releases.get(engine, submission_id)
            if told is None:
                told = _release(ctx, sub, dataset, policy, version, raw, candidate, folds, champion_id, shown)
    except DamagedLosses as exc:
        # A retry would find the same file: fail now, with nothing released, rather than stay running.
        error = f"{exc}; nothing about the holdout was released"
        submissions.transition(engine, submission_id, "failed", LIVE_STATES, error=error, reopen=True)
        return {"submission_id": submission_id, "decision": None, "holdout": "not released"}

    figure, hidden, failed = holdout_reading(told, metric)
    # Only beside the submission's own released figure: the rule then tells nothing the counted release
    # does not already answer, save whether a few extreme rows explain a gap.
    trimmed = _trimmed(ctx, dataset, submission_id, metric) if figure is not None else None
    verdict = judge(policy, candidate, evidence.baseline, evidence.champion, figure, evidence.plan,
                    policy_version=version, holdout_hidden=hidden, holdout_failed=failed,
                    champion_holdout=sealed_champion.recorded_entry(ctx, submission_id), holdout_trimmed=trimmed)
    # Publication follows the release order on the dataset (a later release must not show an earlier one's
    # effect, a ladder's best, before that one is shown): the release row carries the moment.
    published = as_utc(told["released_at"]) or published
    submissions.store_verdict(engine, submission_id, verdict, version, evidence.champion_id, at=published)
    submissions.transition(engine, submission_id, "succeeded", LIVE_STATES, published_at=published)
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


def _release(
    ctx: WorkerContext, sub: Mapping[str, Any], dataset: Mapping[str, Any], policy: Policy, version: int,
    raw: Mapping[str, Any], candidate: Mapping[Cell, float], folds: list[dict[str, Any]], champion_id: str | None,
    shown: timing.Moment,
) -> dict[str, Any]:
    """Release the stored outcome under the policy, counted against the submitter's and the team's budget,
    then make the champion decision on the sealed rows when the budget still allows one more query.

    A late answer (``shown.late``: its time tells that the sealed step ran past the prompt time) spends one
    more unit, before the champion decision is weighed against what is left."""
    engine = ctx.engine
    published, late = shown.at, int(shown.late)
    values = np.array(list(candidate.values()), dtype=float)
    last = holdout_releases.latest(engine, dataset["id"])
    state: dict[str, Any] = dict(last["state"]) if last else {}
    # Strictly after the dataset's latest release: the mechanisms' state is read from the latest one.
    after_last = as_utc(last["released_at"]) if last else None
    published = published if after_last is None else max(published, after_last + timedelta(microseconds=1))
    owner = keys.get_key(engine, str(sub["owner_key_id"]))
    identity = owner.budget_identity if owner is not None else str(sub["owner_key_id"])
    spent_at = [as_utc(t) or utcnow() for t in holdout_releases.spent_times(engine, dataset["id"], identity)]
    team_spent_at = [as_utc(t) or utcnow() for t in holdout_releases.spent_times(engine, dataset["id"])]
    failed = bool(raw.get("error"))
    holdout = HoldoutScores(
        submission_id=sub["id"],
        scores={m: float(v) for m, v in (raw["scores"] or {}).items() if v is not None},
        cv_mean=float(values.mean()) if values.size else float("nan"),
        cv_std=float(values.std(ddof=1)) if values.size > 1 else 0.0,
        fold_test_rows=float(np.mean([r["test_rows"] for r in folds])) if folds else 0.0,
        holdout_rows=int(dataset["rows_holdout"]),
        per_example=None if failed else load_per_example(ctx.settings, dataset["id"], sub["id"],
                                                         policy.primary_metric),
        failed=failed,
    )
    best_id = (state.get("ladder") or {}).get("best_submission")
    best = load_per_example(ctx.settings, dataset["id"], str(best_id), policy.primary_metric) if best_id else None
    # Fresh OS entropy for the noise of thresholdout: a seed anyone could know would undo the noise.
    now = utcnow()
    outcome = release(policy, holdout, state=state, spent_at=spent_at, now=now,
                      rng=np.random.default_rng(), best_per_example=best, team_spent_at=team_spent_at)
    window = policy.release.window_hours
    left = min(budget_status(spent_at, now, policy.release.budget, window).remaining,
               budget_status(team_spent_at, now, policy.release.team_limit, window).remaining) - outcome.spent - late
    # The champion decision on the sealed rows is one more holdout query, paid from the same budgets.
    queried = 0 if failed else sealed_champion.decide_once(ctx, sub, dataset, policy, champion_id, left)
    row, _created = holdout_releases.record(engine, {
        "submission_id": sub["id"], "dataset_id": dataset["id"], "owner_key_id": sub["owner_key_id"],
        "identity": identity, "mode": outcome.mode, "released": outcome.released,
        "spent": outcome.spent + queried + late, "late": bool(late),
        "state": outcome.state, "withheld_until": outcome.withheld_until, "policy_version": version,
        "outcome": outcome.outcome, "released_at": published,  # the unit is spent when the answer is shown
    })
    return row
