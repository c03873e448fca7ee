"""Read the review state of a dataset or submission: the policy in force, what the holdout released.

Shared by the board, the report page and the API, so each of them shows the same policy and the
same released holdout figure. Only the release row is read here -- the raw holdout score never is.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine

from service.gate.policy import default_policy
from service.records import policies
from service.records.engine import iso


def policy_in_force(engine: Engine, dataset: dict[str, Any]) -> dict[str, Any]:
    """Return the policy document in force on a dataset, ``version`` first (0: the task's default)."""
    stored = policies.current(engine, dataset["id"])
    if stored is None:
        version, document = 0, default_policy(str(dataset["task"])).to_document(0)
    else:
        version, document = stored
    body = {k: v for k, v in document.items() if k != "version"}
    return {"version": version, **body}


def holdout_part(release: dict[str, Any] | None, state: str | None = None) -> dict[str, Any]:
    """Shape a release row as the ``result.holdout`` part: what the submitter may see, and why.

    ``state`` is the submission's state, so a failed or canceled one says it will not be scored.
    """
    if release is None:
        waiting = "not scored on the holdout yet"
        if state in ("failed", "canceled"):
            waiting = f"not scored on the holdout: the submission {state}"
        return {"released": False, "mode": None, "scores": None, "withheld_until": None, "note": waiting}
    released = release["released"]
    withheld_until = iso(release["withheld_until"])
    note = None
    if released is None:
        note = ("withheld: the submitter's holdout releases on this dataset are used up for now"
                + (f"; more are available from {withheld_until}" if withheld_until else ""))
    elif release["mode"] == "ladder":
        best = (release["state"].get("ladder") or {}).get("best_submission")
        note = ("ladder: this submission set the dataset's best figure so far" if best == release["submission_id"]
                else "ladder: the dataset's best figure so far; this submission did not beat it by more than the step")
    return {"released": released is not None, "mode": release["mode"], "scores": released,
            "withheld_until": withheld_until, "note": note}
