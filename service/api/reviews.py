"""Review-gate endpoints of a dataset: its policy, its champion, its board.

Every route is team-scoped through ``auth.team_dataset`` (another team's dataset is a 404 like an
unknown id). Setting the policy and promoting a champion need a steward; the records functions
audit both. The policy's rules are ``service.gate.policy``'s; this module only moves documents.
"""

from __future__ import annotations

from typing import Any

from flask import Response, request
from flask.views import MethodView

from service.api import SealfoldBlueprint, json_response, service_context
from service.api.auth import current_key, team_dataset
from service.api.bodies import request_json
from service.api.review_schemas import (
    BoardQuerySchema,
    BoardSchema,
    ChampionRequestSchema,
    ChampionStateSchema,
    PolicyBodySchema,
    PolicySchema,
)
from service.errors import UnsupportedFormat
from service.gate import board, promotion
from service.gate.policy import parse_policy
from service.gate.review_state import champion_state, policy_in_force
from service.records import policies

blp = SealfoldBlueprint("reviews", __name__, url_prefix="/v1/datasets",
                        description="A dataset's review policy, champion and board.")

_POLICY_BODY = {"required": True, "content": {"application/json": {"schema": PolicyBodySchema}},
                "description": "the whole policy; a version in the body is ignored (the server assigns it)"}


def _json_body() -> Any:
    """The request body parsed as JSON: 415 when it is not JSON, 400 when it does not parse."""
    if not request.is_json:
        raise UnsupportedFormat(f"send the policy as application/json, got {request.mimetype or 'no content type'}")
    return request_json(request)


@blp.route("/<ds_id>/policy")
class PolicyItem(MethodView):
    @blp.requires("submitter")
    @blp.response(200, PolicySchema)
    @blp.problem(404, "No such dataset in the caller's team")
    def get(self, ds_id: str) -> Response:
        """Read the review policy in force (version 0: the task's default, never set by a steward)."""
        return json_response(policy_in_force(service_context().engine, team_dataset(current_key(), ds_id)))

    @blp.requires("steward")
    @blp.doc(requestBody=_POLICY_BODY)
    @blp.response(200, PolicySchema, description="Stored as a new version, now in force")
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.problem(415, "The body is not JSON")
    @blp.problem(422, "The policy is not valid; errors point at the fields")
    def put(self, ds_id: str) -> Response:
        """Set the review policy (steward); each PUT is a new version, audited, judging later submissions."""
        caller, engine = current_key(), service_context().engine
        dataset = team_dataset(caller, ds_id)
        document = parse_policy(_json_body(), str(dataset["task"]), classes=dataset.get("classes")).to_document(0)
        del document["version"]  # the records assign it
        version = policies.put(engine, dataset["id"], document, caller.id)
        return json_response({"version": version, **document})


@blp.route("/<ds_id>/champion")
class ChampionItem(MethodView):
    @blp.requires("submitter")
    @blp.response(200, ChampionStateSchema)
    @blp.problem(404, "No such dataset in the caller's team")
    def get(self, ds_id: str) -> Response:
        """Read the champion in force and the history of promotions."""
        dataset = team_dataset(current_key(), ds_id)
        return json_response(champion_state(service_context().engine, dataset["id"]))

    @blp.requires("steward")
    @blp.arguments(ChampionRequestSchema)
    @blp.response(200, ChampionStateSchema, description="Promoted (or already the champion); with the history")
    @blp.problem(404, "No such dataset or submission in the caller's team")
    @blp.problem(409, "The submission's verdict is not pass")
    @blp.problem(415, "The body is not JSON")
    @blp.problem(422, "The submission is on another dataset")
    def post(self, body: dict[str, Any], ds_id: str) -> Response:
        """Promote a submission that passed to champion (steward); the previous one stays in the history."""
        caller, engine = current_key(), service_context().engine
        dataset = team_dataset(caller, ds_id)
        promotion.promote(engine, caller, dataset, body["submission"])
        return json_response(champion_state(engine, dataset["id"]))


@blp.route("/<ds_id>/board")
class Board(MethodView):
    @blp.requires("submitter")
    @blp.arguments(BoardQuerySchema, location="query")
    @blp.response(200, BoardSchema)
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.problem(422, "A bad limit, or a cursor from another board or an older policy")
    def get(self, query: dict[str, Any], ds_id: str) -> Response:
        """Rank the dataset's submissions by the primary metric's CV mean, best first; the champion marked."""
        dataset = team_dataset(current_key(), ds_id)
        return json_response(board.board_document(service_context().engine, dataset, query["limit"],
                                                  query["cursor"]))
