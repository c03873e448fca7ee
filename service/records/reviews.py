"""Review records: dataset policies (versioned), champions (with history), holdout releases, verdicts."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Engine, func, select, update
from sqlalchemy.exc import IntegrityError

from service.records import audit
from service.records.engine import iso, utcnow
from service.records.tables import champions, datasets, holdout_releases, policies, submissions


def current_policy(engine: Engine, dataset_id: str) -> tuple[int, dict[str, Any]] | None:
    """Return (version, document) of a dataset's policy in force, or None when none was ever set."""
    with engine.connect() as conn:
        row = conn.execute(
            select(policies.c.version, policies.c.document).where(policies.c.dataset_id == dataset_id)
            .order_by(policies.c.version.desc()).limit(1)
        ).first()
    return None if row is None else (int(row.version), dict(row.document))


def put_policy(engine: Engine, dataset_id: str, document: dict[str, Any], actor: str) -> int:
    """Store a new policy version and audit it; return the version number."""
    with engine.begin() as conn:
        latest = conn.execute(
            select(func.max(policies.c.version)).where(policies.c.dataset_id == dataset_id)
        ).scalar_one()
        version = int(latest or 0) + 1
        conn.execute(policies.insert().values(
            dataset_id=dataset_id, version=version, document=document, set_by=actor, set_at=utcnow()))
        team = conn.execute(select(datasets.c.team).where(datasets.c.id == dataset_id)).scalar_one()
        audit.record(conn, actor, team, "policy.set", dataset_id, {"version": version, "policy": document})
    return version


def current_champion(engine: Engine, dataset_id: str) -> str | None:
    """Return the id of the champion in force on a dataset, or None."""
    with engine.connect() as conn:
        value = conn.execute(
            select(champions.c.submission_id).where(champions.c.dataset_id == dataset_id)
            .order_by(champions.c.id.desc()).limit(1)
        ).scalar_one_or_none()
    return None if value is None else str(value)


def promote(engine: Engine, dataset_id: str, submission_id: str, actor: str) -> None:
    """Make a submission the dataset's champion; the previous one stays in the history."""
    with engine.begin() as conn:
        previous = conn.execute(
            select(champions.c.submission_id).where(champions.c.dataset_id == dataset_id)
            .order_by(champions.c.id.desc()).limit(1)
        ).scalar_one_or_none()
        conn.execute(champions.insert().values(
            dataset_id=dataset_id, submission_id=submission_id, promoted_by=actor, promoted_at=utcnow()))
        team = conn.execute(select(datasets.c.team).where(datasets.c.id == dataset_id)).scalar_one()
        audit.record(conn, actor, team, "champion.promoted", dataset_id,
                     {"submission": submission_id, "previous": previous})


def champion_history(engine: Engine, dataset_id: str) -> list[dict[str, Any]]:
    """Return every promotion on a dataset, newest first."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(champions).where(champions.c.dataset_id == dataset_id).order_by(champions.c.id.desc())
        ).mappings().all()
    return [{"submission": r["submission_id"], "promoted_by": r["promoted_by"],
             "promoted_at": iso(r["promoted_at"])} for r in rows]


def store_verdict(
    engine: Engine, submission_id: str, verdict: dict[str, Any], policy_version: int | None,
    champion_id: str | None,
) -> None:
    """Store the verdict of a submission with the policy version and champion it was judged against."""
    with engine.begin() as conn:
        conn.execute(update(submissions).where(submissions.c.id == submission_id).values(
            verdict=verdict, policy_version=policy_version, champion_id=champion_id, updated_at=utcnow()))


def record_release(engine: Engine, row: dict[str, Any]) -> tuple[dict[str, Any], bool]:
    """Store what a submission's submitter is shown of the holdout, once; return (row, created)."""
    values = {"released_at": utcnow(), **row}
    try:
        with engine.begin() as conn:
            conn.execute(holdout_releases.insert().values(**values))
            team = conn.execute(
                select(submissions.c.team).where(submissions.c.id == values["submission_id"])).scalar_one()
            audit.record(conn, "system", team, "holdout.released", values["submission_id"],
                         {"mode": values["mode"], "released": values["released"] is not None,
                          "spent": values["spent"]})
    except IntegrityError:
        existing = get_release(engine, values["submission_id"])
        if existing is None:
            raise
        return existing, False
    return values, True


def get_release(engine: Engine, submission_id: str) -> dict[str, Any] | None:
    """Return the release row of a submission, or None."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_releases).where(holdout_releases.c.submission_id == submission_id)
        ).mappings().first()
    return None if row is None else dict(row)


def releases_since(
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


def last_release(engine: Engine, dataset_id: str) -> dict[str, Any] | None:
    """Return the newest release on a dataset (the mechanisms' running state lives there)."""
    with engine.connect() as conn:
        row = conn.execute(
            select(holdout_releases).where(holdout_releases.c.dataset_id == dataset_id)
            .order_by(holdout_releases.c.released_at.desc()).limit(1)
        ).mappings().first()
    return None if row is None else dict(row)
