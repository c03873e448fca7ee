"""Champion tests: the champion decision on the sealed rows, once per submission, and each dataset's stream.

The online procedure (service.gate.online) needs, per dataset, how many tests ran and which passed;
that state is these rows (``seq`` in order). A row is written once per submission (primary key), so a
retried verdict job finds its decision instead of testing again and spending a second level; the
unique (dataset, seq) pair makes two writers of one place in the stream fail loudly instead of
silently sharing a level. The verdict job writes under the dataset's release lock.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, select
from sqlalchemy.exc import IntegrityError

from service.gate.online import Stream
from service.records.engine import utcnow
from service.records.tables import champion_tests


def get(engine: Engine, submission_id: str) -> dict[str, Any] | None:
    """Return a submission's champion test row, or None."""
    with engine.connect() as conn:
        row = conn.execute(
            select(champion_tests).where(champion_tests.c.submission_id == submission_id)).mappings().first()
    return None if row is None else dict(row)


def stream(engine: Engine, dataset_id: str) -> Stream:
    """Return the dataset's stream of tests so far: their count and which (1-based) passed."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(champion_tests.c.seq, champion_tests.c.passed)
            .where(champion_tests.c.dataset_id == dataset_id, champion_tests.c.seq.is_not(None))
            .order_by(champion_tests.c.seq)).all()
    seqs = [int(r.seq) for r in rows]
    if seqs != list(range(1, len(seqs) + 1)):
        raise RuntimeError(f"the champion test stream of dataset {dataset_id} has gaps: {seqs[:20]}")
    return Stream(len(seqs), tuple(int(r.seq) for r in rows if r.passed))


def record(engine: Engine, row: dict[str, Any]) -> tuple[dict[str, Any], bool]:
    """Store a submission's champion decision once; return (row, created)."""
    values = {"tested_at": utcnow(), **row}
    try:
        with engine.begin() as conn:
            conn.execute(champion_tests.insert().values(**values))
    except IntegrityError:
        existing = get(engine, values["submission_id"])
        if existing is None:
            raise
        return existing, False
    return values, True
