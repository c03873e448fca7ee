"""Dataset policy records: versioned, a PUT adds a version and the newest is in force."""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, func, select

from service.records import audit
from service.records.engine import iso, utcnow
from service.records.tables import datasets, policies


def current(engine: Engine, dataset_id: str) -> tuple[int, dict[str, Any]] | None:
    """Return (version, document) of a dataset's policy in force, or None when none was ever set."""
    with engine.connect() as conn:
        row = conn.execute(
            select(policies.c.version, policies.c.document).where(policies.c.dataset_id == dataset_id)
            .order_by(policies.c.version.desc()).limit(1)
        ).first()
    return None if row is None else (int(row.version), dict(row.document))


def put(engine: Engine, dataset_id: str, document: dict[str, Any], actor: str) -> int:
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


def history(engine: Engine, dataset_id: str) -> list[dict[str, Any]]:
    """Return every stored policy version of a dataset, newest first, with who set it and when."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(policies).where(policies.c.dataset_id == dataset_id).order_by(policies.c.version.desc())
        ).mappings().all()
    return [{"version": int(r["version"]), "document": dict(r["document"]), "set_by": r["set_by"],
             "set_at": iso(r["set_at"])} for r in rows]
