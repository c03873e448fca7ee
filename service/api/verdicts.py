"""Verdict endpoints: a submission's verdict history, and re-judging under the policy in force (steward).

Re-judging recomputes a verdict from the stored fold scores (no refit); what it may ask of the holdout is
``service.gate.rejudge``'s rule. Submissions and datasets are team-scoped: another team's is a 404.
"""

from __future__ import annotations

from typing import Any

from flask import Response
from flask.views import MethodView

from service import team_scope
from service.api import SealfoldBlueprint, json_response, service_context
from service.api.auth import current_key, team_submission
from service.api.verdict_schemas import (
    RejudgeDatasetBodySchema,
    RejudgeDatasetSchema,
    RejudgeOneSchema,
    VerdictHistorySchema,
)
from service.gate import rejudge
from service.gate.review_state import policy_in_force
from service.records import submissions, verdicts
from service.records.keys import KeyInfo

blp = SealfoldBlueprint("verdicts", __name__, url_prefix="/v1",
                        description="Verdict history; re-judging under the policy in force (steward).")


def _dataset(caller: KeyInfo, ds_id: str) -> dict[str, Any]:
    """The internal dataset row (the core reads its sizes); nothing of it is answered but its id."""
    return team_scope.team_dataset(service_context().engine, caller, ds_id)


def history_document(sub: dict[str, Any], dataset: dict[str, Any]) -> dict[str, Any]:
    """A submission's verdicts oldest first, and whether the newest was judged under the policy in force."""
    version = int(policy_in_force(service_context().engine, dataset)["version"])
    current = None if sub["verdict"] is None else sub["policy_version"] == version
    # A verdict not yet to be shown (service.gate.timing) has no history to read either.
    history = [] if sub.get("held_back") else verdicts.history(service_context().engine, sub["id"])
    return {"submission": sub["id"], "policy_version_in_force": version, "judged_under_policy_in_force": current,
            "history": history}


@blp.route("/submissions/<sub_id>/verdicts")
class SubmissionVerdicts(MethodView):
    @blp.requires("submitter")
    @blp.response(200, VerdictHistorySchema)
    @blp.problem(404, "No such submission in the caller's team")
    def get(self, sub_id: str) -> Response:
        """List every verdict the submission was given, each with the policy version it was judged under."""
        caller = current_key()
        sub = team_submission(caller, sub_id)
        return json_response(history_document(sub, _dataset(caller, sub["dataset_id"])))

    @blp.requires("steward")
    @blp.response(200, RejudgeOneSchema, description="Re-judged, or already judged under the policy in force")
    @blp.problem(404, "No such submission in the caller's team")
    @blp.problem(409, "The submission has no verdict to re-judge, or lacks the primary metric's fold scores")
    @blp.problem(503, "The dataset's holdout accounting stayed busy, or the queue is down")
    def post(self, sub_id: str) -> Response:
        """Re-judge a submission under the policy and champion in force, from its stored fold scores (steward).

        Nothing is refitted. The holdout-gap rule reuses an earlier verdict's answer to the same question;
        a new question uses one unit of the submitter's holdout budget, and with none left it reads
        inconclusive. The released holdout figure is never released again.
        """
        caller, ctx = current_key(), service_context()
        sub = team_submission(caller, sub_id)
        dataset = _dataset(caller, sub["dataset_id"])
        outcome = rejudge.rejudge(ctx.engine, ctx.redis, sub_id, dataset, caller.id)
        row = submissions.get(ctx.engine, sub_id)
        assert row is not None
        return json_response({**outcome.document(), "verdict": row["verdict"]})


@blp.route("/datasets/<ds_id>/verdicts")
class DatasetVerdicts(MethodView):
    @blp.requires("steward")
    @blp.arguments(RejudgeDatasetBodySchema, required=False)
    @blp.response(200, RejudgeDatasetSchema)
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.problem(415, "The body is not JSON")
    @blp.problem(422, "A bad limit or cursor")
    @blp.problem(503, "The dataset's holdout accounting stayed busy, or the queue is down")
    def post(self, body: dict[str, Any], ds_id: str) -> Response:
        """Re-judge the dataset's submissions judged under another policy version, oldest first (steward)."""
        caller, ctx = current_key(), service_context()
        dataset = _dataset(caller, ds_id)
        body = body or {}
        done, after = rejudge.rejudge_dataset(ctx.engine, ctx.redis, dataset, caller.id,
                                              limit=int(body.get("limit") or 100), after=body.get("after"))
        version = int(policy_in_force(ctx.engine, dataset)["version"])
        return json_response({"dataset": dataset["id"], "policy_version": version,
                              "results": [d.document() for d in done], "next_after": after})
