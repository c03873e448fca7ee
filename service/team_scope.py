"""Team scoping: a key reaches its own team's datasets, submissions and keys, and nothing else.

Each resource is checked here and only here. A record of another team answers NotFound exactly like
an id that does not exist, so a key can never learn whether some other team's id is real. The review
records of a dataset (policy, champion, board) are reached through the dataset, so they are scoped
by ``team_dataset``.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine

from service.errors import NotFound, SealfoldError, field_error
from service.gate import timing
from service.records import datasets, keys, submission_versions, submissions
from service.records.engine import utcnow
from service.records.keys import KeyInfo
from service.records.submission_versions import SubmissionVersion


def team_dataset(engine: Engine, caller: KeyInfo, ds_id: str, pointer: str | None = None) -> dict[str, Any]:
    """Return the whole row of one of the caller's team's datasets, else NotFound.

    The row includes the seal's secrets: the core works on it, and a response shows it only through
    ``records.datasets.public_view``. ``pointer`` names the request field the id came from, if any.
    """
    row = datasets.get_internal(engine, ds_id)
    if row is None or row["team"] != caller.team:
        raise _absent(f"no dataset {ds_id!r} in team {caller.team!r}", pointer)
    return row


def team_submission(engine: Engine, caller: KeyInfo, sub_id: str, pointer: str | None = None) -> dict[str, Any]:
    """Return the row of one of the caller's team's submissions as it may be read now, else NotFound.

    A verdict not yet to be shown (``service.gate.timing``) reads as running, with ``held_back`` set: whatever
    is built on the row then leaves out its verdict, its holdout release and its finished time.
    """
    row = submissions.get(engine, sub_id)
    if row is None or row["team"] != caller.team:
        raise _absent(f"no submission {sub_id!r} in team {caller.team!r}", pointer)
    return timing.shown_as(row, utcnow())


def team_submission_version(engine: Engine, caller: KeyInfo, sub_id: str) -> SubmissionVersion:
    """Return what one of the caller's team's submissions' document changes with, else NotFound."""
    version = submission_versions.get(engine, sub_id)
    if version is None or version.team != caller.team:
        raise _absent(f"no submission {sub_id!r} in team {caller.team!r}", None)
    return version


def team_key(engine: Engine, caller: KeyInfo, key_id: str) -> KeyInfo:
    """Return one of the caller's team's API keys, else NotFound."""
    info = keys.get_key(engine, key_id)
    if info is None or info.team != caller.team:
        raise _absent(f"no key {key_id!r} in team {caller.team!r}", None)
    return info


def _absent(detail: str, pointer: str | None) -> SealfoldError:
    return NotFound(detail) if pointer is None else field_error(NotFound, pointer, detail)
