"""Champion records: every promotion is kept; the champion in force is a dataset's newest one."""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, select

from service.records import audit
from service.records.engine import iso, utcnow
from service.records.tables import champions, datasets


def current(engine: Engine, dataset_id: str) -> str | None:
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


def history(engine: Engine, dataset_id: str) -> list[dict[str, Any]]:
    """Return every promotion on a dataset, newest first."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(champions).where(champions.c.dataset_id == dataset_id).order_by(champions.c.id.desc())
        ).mappings().all()
    return [{"submission": r["submission_id"], "promoted_by": r["promoted_by"],
             "promoted_at": iso(r["promoted_at"])} for r in rows]
