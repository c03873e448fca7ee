"""Read the review state of a dataset or submission: the policy in force, what the holdout released.

Shared by the board, the report page and the API, so each of them shows the same policy and the
same released holdout figure. Only the release row is read here -- the raw holdout score never is.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine

from service.gate.policy import default_policy
from service.gate.release import FAILED, FAILED_NOTE
from service.records import champions, policies, submissions
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


def champion_state(engine: Engine, dataset_id: str) -> dict[str, Any]:
    """The champion in force with its label and verdict, and every promotion newest first."""
    history = champions.history(engine, dataset_id)
    champion = None
    if history:
        row = submissions.get(engine, history[0]["submission"])
        champion = {**history[0], "label": row["label"] if row else "",
                    "verdict": ((row or {}).get("verdict") or {}).get("decision")}
    return {"dataset": dataset_id, "champion": champion, "history": history}


# Said of a verdict shown after its prompt time because of the step on the sealed rows (service.gate.timing).
LATE_NOTE = ("; the verdict came after its prompt time because of the step on the holdout rows, which told "
             "something of them and so counted as one more holdout query")


def holdout_part(release: dict[str, Any] | None, state: str | None = None,
                 policy_version: int | None = None) -> dict[str, Any]:
    """Shape a release row as the ``result.holdout`` part: what the submitter may see, and why.

    ``state`` is the submission's state, so a failed or canceled one says it will not be scored;
    ``policy_version`` is the submission's, for release rows from before they kept their own.
    """
    if release is None:
        waiting = "not scored on the holdout yet"
        if state in ("failed", "canceled"):
            waiting = f"not scored on the holdout: the submission {state}"
        return {"released": False, "mode": None, "scores": None, "withheld_until": None, "note": waiting,
                "policy_version": None, "ladder": None, "summary": waiting, "late": False}
    late = bool(release.get("late"))
    released = release["released"]
    withheld_until = iso(release["withheld_until"])
    note = None
    if release.get("outcome") == FAILED:
        # Told only because the budget allowed it, in the same words whatever failed.
        return {"released": False, "mode": release["mode"], "scores": None, "withheld_until": None,
                "note": FAILED_NOTE, "policy_version": release.get("policy_version") or policy_version,
                "ladder": None, "summary": "no holdout figure: " + FAILED_NOTE[0].lower() + FAILED_NOTE[1:]
                + (LATE_NOTE if late else ""), "late": late}
    if released is None:
        note = ("withheld: the submitter's or the team's holdout queries on this dataset are used up for now"
                + (f"; more are available from {withheld_until}" if withheld_until else ""))
    ladder = ladder_reading(release["mode"], released, (release["state"].get("ladder") or {}).get("best_submission"),
                            release["submission_id"])
    if ladder is not None:
        note = ("ladder: this submission set the dataset's best figure so far" if ladder["new_best"]
                else "ladder: the dataset's best figure so far; this submission did not beat it by more than the step")
    version = release.get("policy_version")
    return {"released": released is not None, "mode": release["mode"], "scores": released,
            "withheld_until": withheld_until, "note": note,
            "policy_version": policy_version if version is None else version, "ladder": ladder,
            "summary": holdout_summary(release["mode"], released, ladder, note) + (LATE_NOTE if late else ""),
            "late": late}


def ladder_reading(mode: str | None, released: dict[str, float] | None, holder: str | None,
                   submission_id: str) -> dict[str, Any] | None:
    """Say what a ladder figure is: the dataset's best so far, whether this submission set it, who holds it.

    Only for a released ladder figure. ``holder`` is the ladder's best submission just after this
    release; every release that moved the ladder says so in its own document, so naming the holder
    tells a reader nothing the ladder had not already published to the team.
    """
    if mode != "ladder" or not released:
        return None
    metric, figure = next(iter(released.items()))  # the ladder releases the primary metric only
    return {"metric": metric, "new_best": holder == submission_id, "best_so_far": figure, "held_by": holder}


def holdout_summary(mode: str | None, released: dict[str, float] | None, ladder: dict[str, Any] | None,
                    note: str | None) -> str:
    """Return one plain sentence on what the holdout figure is, so nobody reads a best-so-far as this model's."""
    if ladder is not None:
        best = f"{ladder['metric']} {_figure(ladder['best_so_far'])}"
        if ladder["new_best"]:
            return f"new best: {best} (ladder: this submission set the dataset's best holdout figure so far)"
        held = f", held by {ladder['held_by']}" if ladder["held_by"] else ""
        return (f"no new best (best so far {best}{held}); this submission's own holdout figure is not released "
                "under the ladder")
    if not released:
        return note or "no holdout figure released"
    shown = ", ".join(f"{m} {_figure(v)}" for m, v in released.items())
    if mode == "thresholdout":
        return (f"thresholdout answer: {shown} (the CV mean when the holdout agrees with it, otherwise a noisy "
                "holdout score)")
    return f"this submission's holdout score: {shown} ({mode}, rounded)"


def _figure(value: float | None) -> str:
    return "-" if value is None else f"{value:.12g}"
