"""Promote a submission to champion: only a submission of the dataset whose verdict is pass.

The API and the browser desk both promote through ``promote``, so both refuse the same cases with
the same messages.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine

from service import team_scope
from service.errors import Conflict, FieldProblem, InputError, field_error
from service.records import champions
from service.records.keys import KeyInfo


def promote(engine: Engine, caller: KeyInfo, dataset: dict[str, Any], sub_id: str) -> None:
    """Make ``sub_id`` the champion of ``dataset`` (a no-op when it already is); refuse anything else.

    ``dataset`` is the caller's team's dataset as ``team_scope.team_dataset`` returned it.
    """
    row = team_scope.team_submission(engine, caller, sub_id, pointer="/submission")
    if row["dataset_id"] != dataset["id"]:
        raise field_error(InputError, "/submission", f"submission {sub_id} is on dataset {row['dataset_id']}, "
                          f"not {dataset['id']}; a champion must be a submission of this dataset")
    decision = (row["verdict"] or {}).get("decision")
    if decision != "pass":
        why = (f"its verdict is {decision!r}" if decision else
               f"it has no verdict yet (state {row['state']})")
        raise Conflict(f"submission {sub_id} cannot be champion: {why}; only a submission whose verdict is "
                       "'pass' can be promoted",
                       [FieldProblem("/submission", "the submission's verdict is not 'pass'")])
    if champions.current(engine, dataset["id"]) != sub_id:
        champions.promote(engine, dataset["id"], sub_id, caller.id)
