"""Champion folds: the champion's configuration scored on a fold plan other than its own, cached per plan.

When a candidate runs another plan than the champion (5x2cv, a fold-count override), the CV
comparison needs the champion's scores on the candidate's splits. They are computed once per
(champion, plan, repeat, fold) by ``worker.jobs.champion_fold`` and reused by every later candidate
on that plan; the first stored outcome of a cell stands (primary key).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, select
from sqlalchemy.exc import IntegrityError

from service.records.engine import utcnow
from service.records.tables import champion_folds


def plan_name(plan_key: tuple[str, int, int]) -> str:
    """Return the plan column's value for a plan key (scheme, folds, seed)."""
    scheme, folds, seed = plan_key
    return f"{scheme}-{folds}-{seed}"


def record(engine: Engine, champion_id: str, plan: str, repeat: int, fold: int, **fields: Any) -> bool:
    """Store one cell's outcome once; return whether this call stored it."""
    values = {"champion_id": champion_id, "plan": plan, "repeat": repeat, "fold": fold, "finished_at": utcnow(),
              **fields}
    try:
        with engine.begin() as conn:
            conn.execute(champion_folds.insert().values(**values))
    except IntegrityError:
        return False
    return True


def rows(engine: Engine, champion_id: str, plan: str) -> list[dict[str, Any]]:
    """Return the stored cells of a champion on a plan, in (repeat, fold) order."""
    with engine.connect() as conn:
        found = conn.execute(
            select(champion_folds).where(champion_folds.c.champion_id == champion_id, champion_folds.c.plan == plan)
            .order_by(champion_folds.c.repeat, champion_folds.c.fold)).mappings().all()
    return [dict(r) for r in found]
