"""Deployment-wide figures for ``/metrics``, computed in SQL so a scrape moves a few numbers, not rows.

Every figure is summed over all teams: nothing here is grouped by team, key, dataset or submission.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import Engine, Text, case, cast, func, literal, or_, select

from service.records.engine import utcnow
from service.records.tables import fold_results, holdout_releases, submissions
from service.vocabulary import TERMINAL_STATES


def _seconds_between(engine: Engine, start: Any, end: Any) -> Any:
    """SQL for ``end - start`` in seconds, on SQLite and PostgreSQL."""
    if engine.dialect.name == "sqlite":
        return (func.julianday(end) - func.julianday(start)) * literal(86400.0)
    return func.extract("epoch", end - start)


def _bucketed(engine: Engine, duration: Any, where: Any, group: Any, buckets: Sequence[float]) -> dict[str, Any]:
    """Per group: cumulative counts at each bucket's upper bound, the total count and the sum of durations."""
    columns = [func.sum(case((duration <= b, 1), else_=0)) for b in buckets]
    query = select(group, func.count(), func.coalesce(func.sum(duration), 0.0), *columns).where(where).group_by(group)
    with engine.connect() as conn:
        rows = conn.execute(query).all()
    return {
        str(row[0]): {"count": int(row[1]), "sum": float(row[2]),
                      "buckets": [(b, int(n or 0)) for b, n in zip(buckets, row[3:], strict=True)]}
        for row in rows
    }


def submission_durations(engine: Engine, buckets: Sequence[float]) -> dict[str, Any]:
    """Created -> finished seconds of finished submissions, by final state."""
    duration = _seconds_between(engine, submissions.c.created_at, submissions.c.finished_at)
    # A verdict not yet shown (service.gate.timing) is left out until its finished time, its publication.
    where = (submissions.c.state.in_(TERMINAL_STATES) & submissions.c.finished_at.is_not(None)
             & (submissions.c.finished_at <= utcnow()))
    return _bucketed(engine, duration, where, submissions.c.state, buckets)


def fold_durations(engine: Engine, buckets: Sequence[float]) -> dict[str, Any]:
    """Fit + scoring seconds of recorded folds, by status (``ok`` or ``failed``)."""
    duration = func.coalesce(fold_results.c.fit_seconds, 0.0) + func.coalesce(fold_results.c.score_seconds, 0.0)
    return _bucketed(engine, duration, literal(True), fold_results.c.status, buckets)


def holdout_queries(engine: Engine) -> dict[str, int]:
    """How many holdout queries were answered with a figure (``released``) and without one (``withheld``)."""
    withheld = or_(holdout_releases.c.released.is_(None), cast(holdout_releases.c.released, Text) == "null")
    query = (select(func.sum(case((withheld, 1), else_=0)), func.count()).select_from(holdout_releases)
             .where(holdout_releases.c.released_at <= utcnow()))  # counted once shown (service.gate.timing)
    with engine.connect() as conn:
        none, total = conn.execute(query).one()
    return {"released": int(total or 0) - int(none or 0), "withheld": int(none or 0)}
