"""What a submission's document is made of, read in one query: enough to tell whether it changed.

A client polling ``GET /v1/submissions/{id}`` mostly asks "anything new?". The answer needs no
document: the document is built from the submission row, its fold rows and its release row
(``service.submission.document``), and each of those changes only in a way this query sees --

- every write to a submission row sets ``updated_at`` (``records.submissions``' updates all do);
- fold rows are only ever added, so their count moves;
- the release row is written once, and is read here whole;
- a verdict held back until its publication (``service.gate.timing``) leaves ``updated_at`` alone, and
  ``published_at`` says until when the document reads as still running.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import Engine, bindparam, func, select

from service.records.tables import fold_results, holdout_releases, submissions

_RELEASE = "release_"
_FOLDS_DONE = select(func.count()).select_from(fold_results).where(
    fold_results.c.submission_id == submissions.c.id).scalar_subquery()
_QUERY = (
    select(submissions.c.id, submissions.c.team, submissions.c.state, submissions.c.updated_at,
           submissions.c.policy_version, submissions.c.published_at, _FOLDS_DONE.label("folds_done"),
           *(column.label(_RELEASE + column.name) for column in holdout_releases.c))
    .select_from(submissions.outerjoin(holdout_releases, holdout_releases.c.submission_id == submissions.c.id))
    .where(submissions.c.id == bindparam("sub_id"))
)


@dataclass(frozen=True)
class SubmissionVersion:
    """The parts of a submission's records that its document changes with."""

    id: str
    team: str
    state: str
    updated_at: datetime
    policy_version: int | None
    folds_done: int
    release: dict[str, Any] | None
    published_at: datetime | None = None


def get(engine: Engine, sub_id: str) -> SubmissionVersion | None:
    """Return the version of one submission, or None when there is no such submission."""
    with engine.connect() as conn:
        row = conn.execute(_QUERY, {"sub_id": sub_id}).mappings().first()
    if row is None:
        return None
    release = None
    if row[_RELEASE + "submission_id"] is not None:
        release = {key[len(_RELEASE):]: value for key, value in row.items() if key.startswith(_RELEASE)}
    return SubmissionVersion(row["id"], row["team"], row["state"], row["updated_at"], row["policy_version"],
                             int(row["folds_done"]), release, row["published_at"])
