"""Where one submission's POST -> succeeded went, from the records: the holdout step's times against the folds'.

Read from the records DB of the benchmark's own stack (operators' figures, never shown to a submitter): when
the holdout job opened the seal, its prompt time and deadline (``service.gate.timing``), when the holdout
outcome and the cross-validation summary were stored, when the verdict was published, and whether it came
late (one more counted query). Seconds from the POST.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import Engine, select

from service.records.engine import as_utc
from service.records.tables import holdout_claims, holdout_releases, holdout_scores, submissions


def timeline(engine: Engine, submission_id: str, posted_wall: float) -> str:
    """One line: each moment of the submission as seconds after ``posted_wall`` (a time.time())."""
    with engine.connect() as conn:
        claim = conn.execute(select(holdout_claims).where(holdout_claims.c.submission_id == submission_id)).first()
        scored = conn.execute(select(holdout_scores.c.scored_at)
                              .where(holdout_scores.c.submission_id == submission_id)).scalar_one_or_none()
        sub = conn.execute(select(submissions.c.summarized_at, submissions.c.published_at)
                           .where(submissions.c.id == submission_id)).first()
        late = conn.execute(select(holdout_releases.c.late)
                            .where(holdout_releases.c.submission_id == submission_id)).scalar_one_or_none()

    def at(value: datetime | None) -> str:
        moment = as_utc(value)
        return "-" if moment is None else f"{moment.timestamp() - posted_wall:.3f}"

    return (f"seal opened {at(claim.opened_at if claim else None)}, prompt {at(claim.prompt_at if claim else None)}, "
            f"deadline {at(claim.deadline_at if claim else None)}, holdout stored {at(scored)}, "
            f"summary stored {at(sub.summarized_at if sub else None)}, shown {at(sub.published_at if sub else None)}"
            f"{', late' if late else ''}")
