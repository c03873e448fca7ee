"""Holdout claims: which job computes a submission's one holdout outcome.

Two holdout jobs can run for one submission at once (RQ retries a job it believes abandoned while the
original still runs). Before refitting, a job claims the computation: the insert of the claim row
succeeds for one caller only (primary key). The winner renews ``heartbeat_at`` while it works; a
claim whose heartbeat is older than the stale limit belonged to a job that died, and a conditional
update that only one caller can win hands it to the next job. Both hold on SQLite and PostgreSQL.
"""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import Engine, delete, select, update
from sqlalchemy.exc import IntegrityError

from service.records.engine import as_utc, utcnow
from service.records.tables import holdout_claims


def claim(engine: Engine, sub_id: str, token: str, stale_after: timedelta) -> bool:
    """Claim the holdout computation of ``sub_id`` for ``token``; return whether this caller holds it now.

    A fresh claim is won by inserting the row; a stale one (no heartbeat for ``stale_after``) by an
    update whose condition the first winner makes false for everyone after it.
    """
    now = utcnow()
    try:
        with engine.begin() as conn:
            conn.execute(holdout_claims.insert().values(submission_id=sub_id, token=token, heartbeat_at=now))
        return True
    except IntegrityError:
        pass
    with engine.begin() as conn:
        result = conn.execute(
            update(holdout_claims)
            .where(holdout_claims.c.submission_id == sub_id, holdout_claims.c.heartbeat_at < now - stale_after,
                   holdout_claims.c.opened_at.is_(None))
            .values(token=token, heartbeat_at=now)
        )
    return bool(result.rowcount)


def beat(engine: Engine, sub_id: str, token: str) -> bool:
    """Renew the claim held by ``token``; return False when another job has taken it over."""
    with engine.begin() as conn:
        result = conn.execute(
            update(holdout_claims)
            .where(holdout_claims.c.submission_id == sub_id, holdout_claims.c.token == token)
            .values(heartbeat_at=utcnow())
        )
    return bool(result.rowcount)


def open_seal(engine: Engine, sub_id: str, token: str, deadline_seconds: float | None = None,
              prompt_seconds: float | None = None) -> datetime | None:
    """Mark the attempt held by ``token`` spent, just before its first use of the sealed rows; return the deadline.

    The deadline and the prompt time (``service.gate.timing``) are ``deadline_seconds`` and ``prompt_seconds``
    from now, or none. Return None when another
    job has taken the claim over (this one stalled past the stale limit): the caller must then not touch the
    seal.
    """
    now = utcnow()
    deadline = None if deadline_seconds is None else now + timedelta(seconds=deadline_seconds)
    prompt = None if prompt_seconds is None else now + timedelta(seconds=prompt_seconds)
    with engine.begin() as conn:
        result = conn.execute(
            update(holdout_claims)
            .where(holdout_claims.c.submission_id == sub_id, holdout_claims.c.token == token,
                   holdout_claims.c.opened_at.is_(None))
            .values(opened_at=now, heartbeat_at=now, deadline_at=deadline, prompt_at=prompt)
        )
    return (deadline or now) if result.rowcount else None


def times(engine: Engine, sub_id: str) -> tuple[datetime | None, datetime | None]:
    """The prompt time and the deadline fixed for the sealed step of ``sub_id``; None where none was fixed
    (turned off, a claim from before the column, or the seal never opened)."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_claims.c.prompt_at, holdout_claims.c.deadline_at)
            .where(holdout_claims.c.submission_id == sub_id)
        ).first()
    return (None, None) if row is None else (as_utc(row.prompt_at), as_utc(row.deadline_at))


def is_spent(engine: Engine, sub_id: str) -> bool:
    """Whether a job has opened the sealed rows for ``sub_id`` (its one attempt is spent)."""
    with engine.connect() as conn:
        opened = conn.execute(
            select(holdout_claims.c.opened_at).where(holdout_claims.c.submission_id == sub_id)
        ).scalar_one_or_none()
    return opened is not None


def spent_and_stale(engine: Engine, sub_id: str, stale_after: timedelta) -> bool:
    """Whether the attempt is spent and its holder's heartbeat stopped: it ended without storing an outcome."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_claims.c.opened_at, holdout_claims.c.heartbeat_at)
            .where(holdout_claims.c.submission_id == sub_id)
        ).first()
    if row is None or row.opened_at is None:
        return False
    beat_at = as_utc(row.heartbeat_at)
    return beat_at is None or beat_at < utcnow() - stale_after


def release(engine: Engine, sub_id: str, token: str) -> None:
    """Give up the claim held by ``token`` (its job failed before storing an outcome), so a retry need not wait.

    Only the holder's row goes, and only while unspent; a claim another job took over is left alone.
    """
    with engine.begin() as conn:
        conn.execute(delete(holdout_claims).where(holdout_claims.c.submission_id == sub_id,
                                                  holdout_claims.c.token == token,
                                                  holdout_claims.c.opened_at.is_(None)))
