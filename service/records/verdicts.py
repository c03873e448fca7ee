"""Verdict history: every verdict a submission was given, with the policy version it was judged under.

The verdict job adds the first; a steward's re-judge adds later ones (``service.gate.rejudge``).
``submissions.verdict`` always holds the newest, written in the same transaction
(``submissions.store_verdict``), so readers of the submission never see the two disagree.
"""

from __future__ import annotations

import math
from typing import Any

from sqlalchemy import Connection, Engine, and_, or_, select

from service.records.engine import iso
from service.records.tables import submissions, verdicts


def finite(document: Any) -> Any:
    """Return a JSON document with every NaN or infinite number replaced by null.

    JSON has neither; Python writes them as ``NaN``/``Infinity``, which the databases' JSON functions
    (the board's ranking reads the verdict with them) refuse as malformed. A figure that is not finite,
    e.g. a test's bound at an extreme level, is shown as null, as an absent figure is.
    """
    if isinstance(document, float):
        return document if math.isfinite(document) else None
    if isinstance(document, dict):
        return {k: finite(v) for k, v in document.items()}
    if isinstance(document, list | tuple):
        return [finite(v) for v in document]
    return document


def add(conn: Connection, row: dict[str, Any]) -> None:
    """Append one verdict to a submission's history, inside the caller's transaction."""
    conn.execute(verdicts.insert().values(**row))


def history(engine: Engine, submission_id: str) -> list[dict[str, Any]]:
    """Return a submission's verdicts oldest first, as documents (``judged_at`` in ISO 8601)."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(verdicts).where(verdicts.c.submission_id == submission_id).order_by(verdicts.c.id)
        ).mappings().all()
    return [document(dict(r)) for r in rows]


def document(row: dict[str, Any]) -> dict[str, Any]:
    """Shape a history row for a response: what was decided, under which policy and champion, by whom."""
    return {"policy_version": row["policy_version"], "champion": row["champion_id"], "verdict": row["verdict"],
            "judged_by": row["judged_by"], "judged_at": iso(row["judged_at"]),
            "holdout_spent": int(row["holdout_spent"] or 0)}


def judged_under_other_policy(engine: Engine, dataset_id: str, version: int, after: str | None,
                              limit: int) -> list[dict[str, Any]]:
    """Return up to ``limit`` succeeded submissions of a dataset judged under a policy other than ``version``.

    Oldest first, by (created_at, id); ``after`` is the id of the last submission of the previous page.
    """
    query = select(submissions).where(
        submissions.c.dataset_id == dataset_id, submissions.c.state == "succeeded",
        submissions.c.verdict.is_not(None),
        or_(submissions.c.policy_version.is_(None), submissions.c.policy_version != version))
    if after is not None:
        with engine.connect() as conn:
            at = conn.execute(select(submissions.c.created_at).where(submissions.c.id == after)).scalar()
        if at is not None:
            query = query.where(or_(submissions.c.created_at > at,
                                    and_(submissions.c.created_at == at, submissions.c.id > after)))
    query = query.order_by(submissions.c.created_at, submissions.c.id).limit(limit)
    with engine.connect() as conn:
        return [dict(r) for r in conn.execute(query).mappings().all()]
