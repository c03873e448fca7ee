"""Say what a resubmission of a configuration the team already submitted gets back, and how to re-judge it.

The service answers an identical configuration on the same data with the first submission (nothing is
recomputed and no holdout budget is spent). Its verdict may have been judged under an older policy,
and the label sent with the resubmission is not kept; the answer says both, instead of doing so
silently.
"""

from __future__ import annotations

from typing import Any


def resubmission_note(row: dict[str, Any], label_sent: str, version_in_force: int) -> dict[str, Any]:
    """Return the ``resubmission`` part of the answer to a resubmitted configuration."""
    judged = row["policy_version"] if row.get("verdict") is not None else None
    if judged is None:
        verdict = f"it has no verdict yet (state {row['state']}); it will be judged under the policy in force then"
    elif judged == version_in_force:
        verdict = f"its verdict was judged under policy version {judged}, the one in force"
    else:
        verdict = (f"its verdict was judged under policy version {judged}, not version {version_in_force} now in "
                   f"force; a steward can re-judge it from its stored fold scores: POST "
                   f"/v1/submissions/{row['id']}/verdicts (sealfold rejudge {row['id']})")
    label = ""
    if label_sent and label_sent != row["label"]:
        label = f" The label {label_sent!r} was not kept: the submission keeps its label {row['label']!r}."
    message = (f"This configuration was already submitted on this dataset as {row['id']}; that submission is "
               f"answered instead of running it again: {verdict}.{label}")
    return {"submission": row["id"], "judged_under_policy_version": judged,
            "policy_version_in_force": version_in_force,
            "judged_under_policy_in_force": None if judged is None else judged == version_in_force,
            "label_sent": label_sent, "label_kept": row["label"], "message": message}
