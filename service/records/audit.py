"""Audit events: who did what to which record, appended, never updated."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Connection, Engine, select

from service.records.engine import iso, utcnow
from service.records.tables import audit_events

# Events of the step on the sealed rows, kept for operators and not listed to a team.
SEALED_STEP = ("holdout.scored", "holdout.failed")


def record(
    target: Engine | Connection, actor: str, team: str, action: str, subject: str, detail: dict[str, Any],
    *, at: datetime | None = None,
) -> None:
    """Append one event; pass a Connection to make it part of the caller's transaction.

    ``at``: the time it is recorded under (a holdout release: its publication time, ``service.gate.timing``).
    """
    statement = audit_events.insert().values(
        at=utcnow() if at is None else at, actor=actor, team=team, action=action, subject=subject, detail=detail
    )
    if isinstance(target, Connection):
        target.execute(statement)
    else:
        with target.begin() as conn:
            conn.execute(statement)


def events_for(engine: Engine, subject: str) -> list[dict[str, Any]]:
    """Return the events about one subject, oldest first."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(audit_events).where(audit_events.c.subject == subject).order_by(audit_events.c.id)
        ).all()
    return [
        {"at": iso(r.at), "actor": r.actor, "action": r.action, "subject": r.subject, "detail": r.detail}
        for r in rows
    ]


def recent_for_team(engine: Engine, team: str, limit: int = 200) -> list[dict[str, Any]]:
    """Return a team's newest events first, at most ``limit`` of them, as the team may read them now.

    The holdout step's own events (when it ended, and whether it failed) stay with the operators: the team
    learns the outcome from the release, which is listed once published (``service.gate.timing``).
    """
    with engine.connect() as conn:
        rows = conn.execute(
            select(audit_events).where(audit_events.c.team == team, audit_events.c.action.not_in(SEALED_STEP),
                                       audit_events.c.at <= utcnow())
            .order_by(audit_events.c.id.desc()).limit(limit)
        ).all()
    return [
        {"at": iso(r.at), "actor": r.actor, "action": r.action, "subject": r.subject, "detail": r.detail}
        for r in rows
    ]
