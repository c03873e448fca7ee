"""Where one submission's POST -> succeeded went, from the records: the holdout step's times against the folds'.

Read from the records DB of the benchmark's own stack (operators' figures, never shown to a submitter): when
the first job began, when the holdout job opened the seal, its prompt time and deadline
(``service.gate.timing``), when the holdout outcome and the cross-validation summary were stored, when the
verdict was published, and whether it came late (one more counted query). Seconds from the POST.
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
        sub = conn.execute(select(submissions.c.started_at, submissions.c.summarized_at, submissions.c.published_at)
                           .where(submissions.c.id == submission_id)).first()
        late = conn.execute(select(holdout_releases.c.late)
                            .where(holdout_releases.c.submission_id == submission_id)).scalar_one_or_none()

    def at(value: datetime | None) -> str:
        moment = as_utc(value)
        return "-" if moment is None else f"{moment.timestamp() - posted_wall:.3f}"

    opened, prompt, deadline = (claim.opened_at, claim.prompt_at, claim.deadline_at) if claim else (None, None, None)
    started, summarized, shown = (sub.started_at, sub.summarized_at, sub.published_at) if sub else (None, None, None)
    return (f"first job {at(started)}, seal opened {at(opened)}, prompt {at(prompt)}, deadline {at(deadline)}, "
            f"holdout stored {at(scored)}, summary stored {at(summarized)}, shown {at(shown)}"
            f"{', late' if late else ''}")
