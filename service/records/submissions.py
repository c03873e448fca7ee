"""Submission records: the submission row (state, summary, verdict), its fold results and its one holdout score.

Lifecycle: ``queued`` -> ``running`` (first fold starts) -> ``succeeded`` | ``failed``; ``canceled``
from either live state. Transitions are conditional updates, so two workers racing on one
submission cannot move it backwards.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime
from typing import Any

from sqlalchemy import Engine, and_, case, func, select, update
from sqlalchemy.exc import IntegrityError

from service.records import audit, verdicts
from service.records.engine import utcnow
from service.records.tables import fold_results, holdout_scores, submissions
from service.vocabulary import INFRASTRUCTURE_CAUSES, LIVE_STATES, TERMINAL_STATES


def insert(engine: Engine, row: dict[str, Any]) -> None:
    """Insert a new submission (state ``queued``) and its audit event in one transaction."""
    now = utcnow()
    values = {"state": "queued", "created_at": now, "updated_at": now, **row}
    with engine.begin() as conn:
        conn.execute(submissions.insert().values(**values))
        audit.record(
            conn, values["owner_key_id"], values["team"], "submission.created", values["id"],
            {"dataset": values["dataset_id"], "config_fingerprint": values["config_fingerprint"]},
        )


def get(engine: Engine, sub_id: str) -> dict[str, Any] | None:
    """Return one submission row, or None."""
    with engine.connect() as conn:
        row = conn.execute(select(submissions).where(submissions.c.id == sub_id)).mappings().first()
    return None if row is None else dict(row)


def find_by_idempotency_key(engine: Engine, owner_key_id: str, key: str) -> dict[str, Any] | None:
    """Return the submission a key already made under this Idempotency-Key, or None."""
    with engine.connect() as conn:
        row = conn.execute(
            select(submissions).where(
                submissions.c.owner_key_id == owner_key_id, submissions.c.idempotency_key == key
            )
        ).mappings().first()
    return None if row is None else dict(row)


def config_key(team: str, dataset_id: str, config_fingerprint: str, policy_version: int) -> str:
    """Return the key that allows one submission per (team, dataset, configuration, policy version)."""
    canonical = json.dumps([team, dataset_id, config_fingerprint, policy_version], separators=(",", ":"))
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def find_by_config(engine: Engine, team: str, dataset_id: str, config_fingerprint: str,
                   key: str | None = None) -> dict[str, Any] | None:
    """Return the submission holding this configuration key, or an older one of the same configuration.

    Rows from before configuration keys (``config_key`` null) are matched by their fingerprint,
    ignoring canceled ones, as they were then.
    """
    with engine.connect() as conn:
        if key is not None:
            row = conn.execute(select(submissions).where(submissions.c.config_key == key)).mappings().first()
            if row is not None:
                return dict(row)
        row = conn.execute(
            select(submissions).where(
                submissions.c.team == team, submissions.c.dataset_id == dataset_id,
                submissions.c.config_fingerprint == config_fingerprint, submissions.c.state != "canceled",
                submissions.c.config_key.is_(None),
            ).order_by(submissions.c.created_at).limit(1)
        ).mappings().first()
    return None if row is None else dict(row)


def list_for_team(
    engine: Engine, team: str, limit: int = 50, before: tuple[datetime, str] | None = None,
    dataset_id: str | None = None,
) -> list[dict[str, Any]]:
    """Return a team's submissions newest first; ``before`` is the (created_at, id) cursor of a page."""
    query = select(submissions).where(submissions.c.team == team)
    if dataset_id is not None:
        query = query.where(submissions.c.dataset_id == dataset_id)
    if before is not None:
        at, sub_id = before
        query = query.where(
            (submissions.c.created_at < at)
            | and_(submissions.c.created_at == at, submissions.c.id < sub_id)
        )
    query = query.order_by(submissions.c.created_at.desc(), submissions.c.id.desc()).limit(limit)
    with engine.connect() as conn:
        return [dict(r) for r in conn.execute(query).mappings().all()]


def transition(
    engine: Engine, sub_id: str, state: str, from_states: tuple[str, ...], error: str | None = None,
    *, reopen: bool = False, cause: str | None = None, published_at: datetime | None = None,
) -> bool:
    """Move a submission to ``state`` if it is in one of ``from_states``; return whether it moved.

    ``reopen`` (and every cancel, and a failure the infrastructure caused): give up the configuration key,
    so the same configuration may be submitted again -- for a submission that ended through no fault of its
    own or was canceled before any verdict. ``cause`` names why a failed submission failed
    (``service.vocabulary.FAILURE_CAUSES``). ``published_at``: the moment a verdict that read the holdout may
    be shown (``service.gate.timing``), which is then also its finished time.
    """
    now = utcnow()
    # A verdict held back until its publication keeps its row's last change where it was: the time a team
    # reads of it (the desk's last activity) is the publication, once past (``last_activity``).
    values: dict[str, Any] = {"state": state} if published_at is not None else {"state": state, "updated_at": now}
    if reopen or state == "canceled" or cause in INFRASTRUCTURE_CAUSES:
        values["config_key"] = f"reopened:{sub_id}"
    if state == "running":
        values["started_at"] = now
    if state in TERMINAL_STATES:
        values["finished_at"] = now if published_at is None else published_at
    if published_at is not None:
        values["published_at"] = published_at
    if state == "canceled":
        values["published_at"] = None  # a verdict held back is never shown (service.gate.timing.shown_as)
    if error is not None:
        values["error"] = error
    if cause is not None:
        values["failure_cause"] = cause
    with engine.begin() as conn:
        result = conn.execute(
            update(submissions)
            .where(submissions.c.id == sub_id, submissions.c.state.in_(from_states))
            .values(**values)
        )
    return bool(result.rowcount)


def mark_running(engine: Engine, sub_id: str) -> None:
    """Record that work started; a no-op once the submission is running or finished."""
    transition(engine, sub_id, "running", ("queued",))


def store_summary(engine: Engine, sub_id: str, cv_summary: dict[str, Any]) -> None:
    """Store the cross-validation summary document (everything but the holdout score), and when."""
    now = utcnow()
    with engine.begin() as conn:
        conn.execute(
            update(submissions).where(submissions.c.id == sub_id).values(cv_summary=cv_summary, summarized_at=now,
                                                                      updated_at=now)
        )


def store_verdict(
    engine: Engine, sub_id: str, verdict: dict[str, Any], policy_version: int | None, champion_id: str | None,
    *, judged_by: str = "system", holdout_spent: int = 0, at: datetime | None = None,
) -> None:
    """Store the verdict of a submission with the policy version and champion it was judged against.

    The verdict becomes the submission's current one and is appended to its history (``records.verdicts``)
    in the same transaction; ``holdout_spent`` is the units of the owner's holdout budget it used. ``at``: the
    time it is recorded under (a verdict on the holdout: its publication time, ``service.gate.timing``). Such a
    verdict is held back already: its release record set the row's ``published_at`` (``holdout_releases.record``).
    """
    now, verdict = utcnow(), verdicts.finite(verdict)
    judged_at = now if at is None else at
    with engine.begin() as conn:
        owner = conn.execute(select(submissions.c.dataset_id, submissions.c.owner_key_id)
                             .where(submissions.c.id == sub_id)).one()
        changed: dict[str, Any] = {"verdict": verdict, "policy_version": policy_version, "champion_id": champion_id}
        if at is None:  # a verdict shown at once (a re-judge); one held back leaves the row's change time alone
            changed["updated_at"] = now
        conn.execute(update(submissions).where(submissions.c.id == sub_id).values(**changed))
        verdicts.add(conn, {
            "submission_id": sub_id, "dataset_id": owner.dataset_id, "owner_key_id": owner.owner_key_id,
            "policy_version": policy_version, "champion_id": champion_id, "verdict": verdict,
            "judged_by": judged_by, "judged_at": judged_at, "holdout_spent": holdout_spent,
        })


def record_fold(engine: Engine, sub_id: str, repeat: int, fold: int, **fields: Any) -> bool:
    """Store one fold's outcome; a retried fold job finds it stored and keeps the first.

    Returns whether this call stored it.
    """
    values = {"submission_id": sub_id, "repeat": repeat, "fold": fold, "finished_at": utcnow(), **fields}
    try:
        with engine.begin() as conn:  # one write transaction per fold: the row and the submission's version
            conn.execute(fold_results.insert().values(**values))
            conn.execute(update(submissions).where(submissions.c.id == sub_id).values(updated_at=utcnow()))
    except IntegrityError:
        return False
    return True


def fold_rows(engine: Engine, sub_id: str) -> list[dict[str, Any]]:
    """Return the stored fold outcomes in (repeat, fold) order."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(fold_results).where(fold_results.c.submission_id == sub_id)
            .order_by(fold_results.c.repeat, fold_results.c.fold)
        ).mappings().all()
    return [dict(r) for r in rows]


def recorded_cells(engine: Engine, sub_id: str) -> set[tuple[int, int]]:
    """Return the (repeat, fold) cells of a submission that have a fold record."""
    with engine.connect() as conn:
        rows = conn.execute(select(fold_results.c.repeat, fold_results.c.fold)
                            .where(fold_results.c.submission_id == sub_id))
        return {(int(r), int(f)) for r, f in rows}


def folds_done(engine: Engine, sub_id: str) -> int:
    """Count the folds with a stored outcome."""
    with engine.connect() as conn:
        count = conn.execute(
            select(func.count()).select_from(fold_results).where(fold_results.c.submission_id == sub_id)
        ).scalar_one()
    return int(count)


def store_holdout_once(
    engine: Engine, sub_id: str, scores: dict[str, float | None], holdout_fingerprint: str,
    fit_seconds: float | None, *, error: str | None = None,
) -> tuple[dict[str, float | None], bool]:
    """Store the one holdout outcome of a submission; return the stored scores and whether this call won.

    The outcome is the scores, or ``error`` (with no scores) when the one attempt failed. The
    primary key on ``submission_id`` makes a second insert fail, so whichever job gets there first
    wins and every later caller reads the winner's outcome.
    """
    try:
        with engine.begin() as conn:
            conn.execute(
                holdout_scores.insert().values(
                    submission_id=sub_id, scores=scores, holdout_fingerprint=holdout_fingerprint,
                    fit_seconds=fit_seconds, scored_at=utcnow(), error=error,
                )
            )
            sub = conn.execute(select(submissions.c.team).where(submissions.c.id == sub_id)).scalar_one()
            action, detail = ("holdout.scored", {"metrics": sorted(scores)}) if error is None \
                else ("holdout.failed", {"error": error})
            audit.record(conn, "system", sub, action, sub_id, detail)
    except IntegrityError:
        stored = get_holdout(engine, sub_id)
        if stored is None:  # the insert failed for another reason: let it surface
            raise
        return stored["scores"], False
    return scores, True


def get_holdout(engine: Engine, sub_id: str) -> dict[str, Any] | None:
    """Return the stored holdout outcome of a submission (scores, or the error of a failed attempt), or None."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_scores).where(holdout_scores.c.submission_id == sub_id)
        ).mappings().first()
    return None if row is None else dict(row)


def unfinished(engine: Engine, limit: int = 500) -> list[dict[str, Any]]:
    """Return live submissions, oldest first, for the reconciler."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(submissions).where(submissions.c.state.in_(LIVE_STATES))
            .order_by(submissions.c.created_at).limit(limit)
        ).mappings().all()
    return [dict(r) for r in rows]


def count_live(engine: Engine, team: str) -> int:
    """Count a team's queued and running submissions."""
    with engine.connect() as conn:
        count = conn.execute(
            select(func.count()).select_from(submissions)
            .where(submissions.c.team == team, submissions.c.state.in_(LIVE_STATES))
        ).scalar_one()
    return int(count)


def count_by_state(engine: Engine) -> dict[str, int]:
    """Return how many submissions are in each state (for /metrics); a verdict not yet shown counts as running."""
    now = utcnow()
    held = submissions.c.published_at.is_not(None) & (submissions.c.published_at > now)
    state = case((held, "running"), else_=submissions.c.state)
    with engine.connect() as conn:
        rows = conn.execute(select(state, func.count()).group_by(state)).all()
    return {state: int(n) for state, n in rows}


def last_activity(engine: Engine, team: str) -> dict[str, datetime]:
    """Return, per dataset of a team, when one of its submissions last changed (a verdict: once published)."""
    now = utcnow()
    shown = submissions.c.published_at.is_not(None) & (submissions.c.published_at <= now)
    changed = case((shown, submissions.c.published_at), else_=submissions.c.updated_at)
    with engine.connect() as conn:
        rows = conn.execute(
            select(submissions.c.dataset_id, func.max(changed))
            .where(submissions.c.team == team).group_by(submissions.c.dataset_id)
        ).all()
    return {str(ds): at for ds, at in rows if at is not None}
