"""Holdout release records: what a submission's submitter was shown of the holdout, once per submission.

The raw holdout score stays in ``holdout_scores``; a release row holds the figure as released (or
none, when withheld) and the release mechanism's running state after it.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Engine, func, select, update
from sqlalchemy.exc import IntegrityError

from service.records import audit
from service.records.engine import utcnow
from service.records.tables import holdout_releases, submissions


def record(engine: Engine, row: dict[str, Any]) -> tuple[dict[str, Any], bool]:
    """Store what a submission's submitter is shown of the holdout, once; return (row, created).

    The submission is held back until ``released_at`` (its ``published_at``, ``service.gate.timing``) in the
    same transaction: the verdict and the state change follow in later ones, and a row read in between,
    running with no publication time, would show the released figure at once.
    """
    values = {"released_at": utcnow(), **row}
    try:
        with engine.begin() as conn:
            conn.execute(holdout_releases.insert().values(**values))
            conn.execute(update(submissions).where(submissions.c.id == values["submission_id"])
                         .values(published_at=values["released_at"]))
            team = conn.execute(
                select(submissions.c.team).where(submissions.c.id == values["submission_id"])).scalar_one()
            audit.record(conn, "system", team, "holdout.released", values["submission_id"],
                         {"mode": values["mode"], "released": values["released"] is not None,
                          "spent": values["spent"], "outcome": values.get("outcome"),
                          "late": bool(values.get("late"))}, at=values["released_at"])
    except IntegrityError:
        existing = get(engine, values["submission_id"])
        if existing is None:
            raise
        return existing, False
    return values, True


def get(engine: Engine, submission_id: str) -> dict[str, Any] | None:
    """Return the release row of a submission, or None."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_releases).where(holdout_releases.c.submission_id == submission_id)
        ).mappings().first()
    return None if row is None else dict(row)


def list_since(
    engine: Engine, dataset_id: str, since: datetime, owner_key_id: str | None = None
) -> list[dict[str, Any]]:
    """Return a dataset's releases since a moment, oldest first; optionally one submitter's only."""
    query = select(holdout_releases).where(
        holdout_releases.c.dataset_id == dataset_id, holdout_releases.c.released_at >= since)
    if owner_key_id is not None:
        query = query.where(holdout_releases.c.owner_key_id == owner_key_id)
    with engine.connect() as conn:
        rows = conn.execute(query.order_by(holdout_releases.c.released_at)).mappings().all()
    return [dict(r) for r in rows]


def spent_times(engine: Engine, dataset_id: str, identity: str | None = None) -> list[datetime]:
    """Return when holdout queries on a dataset spent budget, one entry per unit, oldest first: the team's, or one
    identity's.

    A row from before identities were recorded counts for its owner key, each old key its own identity.
    """
    who = func.coalesce(holdout_releases.c.identity, holdout_releases.c.owner_key_id)
    query = select(holdout_releases.c.released_at, holdout_releases.c.spent).where(
        holdout_releases.c.dataset_id == dataset_id, holdout_releases.c.spent > 0)
    if identity is not None:
        query = query.where(who == identity)
    with engine.connect() as conn:
        rows = conn.execute(query.order_by(holdout_releases.c.released_at)).all()
    # One entry per unit: a release that also answered the champion decision on the sealed rows spent two.
    return [at for at, spent in rows for _unit in range(int(spent))]


def latest(engine: Engine, dataset_id: str) -> dict[str, Any] | None:
    """Return the newest release on a dataset (the release mechanisms' running state lives there)."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_releases).where(holdout_releases.c.dataset_id == dataset_id)
            .order_by(holdout_releases.c.released_at.desc()).limit(1)
        ).mappings().first()
    return None if row is None else dict(row)
