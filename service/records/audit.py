"""Audit events: who did what to which record, appended, never updated."""

from __future__ import annotations

from typing import Any

from sqlalchemy import Connection, Engine, select

from service.records.engine import iso, utcnow
from service.records.tables import audit_events


def record(
    target: Engine | Connection, actor: str, team: str, action: str, subject: str, detail: dict[str, Any]
) -> None:
    """Append one event; pass a Connection to make it part of the caller's transaction."""
    statement = audit_events.insert().values(
        at=utcnow(), actor=actor, team=team, action=action, subject=subject, detail=detail
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
    """Return a team's newest events first, at most ``limit`` of them."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(audit_events).where(audit_events.c.team == team).order_by(audit_events.c.id.desc()).limit(limit)
        ).all()
    return [
        {"at": iso(r.at), "actor": r.actor, "action": r.action, "subject": r.subject, "detail": r.detail}
        for r in rows
    ]
