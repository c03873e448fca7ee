"""Review-gate endpoints of a dataset: its policy, its champion, its board.

Every route is team-scoped through ``auth.team_dataset`` (another team's dataset is a 404 like an
unknown id). Setting the policy and promoting a champion need a steward; the records functions
audit both. The policy's rules are ``service.gate.policy``'s; this module only moves documents.
"""

from __future__ import annotations

from typing import Any

from flask import Response, request
from flask.views import MethodView

from service import team_scope
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
from service.errors import Conflict, FieldProblem, InputError, UnsupportedFormat, field_error
from service.gate import board
from service.gate.policy import parse_policy
from service.gate.review_state import policy_in_force
from service.records import champions, policies, submissions

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
        document = parse_policy(_json_body(), str(dataset["task"])).to_document(0)
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
        return json_response(champion_state(dataset["id"]))

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
        sub_id = body["submission"]
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
        return json_response(champion_state(dataset["id"]))


def champion_state(dataset_id: str) -> dict[str, Any]:
    """The champion in force with its label and verdict, and every promotion newest first."""
    engine = service_context().engine
    history = champions.history(engine, dataset_id)
    champion = None
    if history:
        row = submissions.get(engine, history[0]["submission"])
        champion = {**history[0], "label": row["label"] if row else "",
                    "verdict": ((row or {}).get("verdict") or {}).get("decision")}
    return {"dataset": dataset_id, "champion": champion, "history": history}


@blp.route("/<ds_id>/board")
class Board(MethodView):
    @blp.requires("submitter")
    @blp.arguments(BoardQuerySchema, location="query")
    @blp.response(200, BoardSchema)
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.problem(422, "A bad limit, or a cursor from another board or an older policy")
    def get(self, query: dict[str, Any], ds_id: str) -> Response:
        """Rank the dataset's submissions by the primary metric's CV mean, best first; the champion marked."""
        caller, engine = current_key(), service_context().engine
        dataset = team_dataset(caller, ds_id)
        policy = policy_in_force(engine, dataset)
        metric = str(policy["primary_metric"])
        order = board.BoardOrder(metric, bool(policy["greater_is_better"]))
        after = None if query["cursor"] is None else board.decode_cursor(query["cursor"], order)
        champion = champions.current(engine, dataset["id"])
        entries, cursor = board.board_page(engine, dataset, order, query["limit"], after, champion,
                                           int(policy["version"]))
        released_under = board.board_policies(engine, dataset, order)
        return json_response({
            "dataset": dataset["id"], "primary_metric": metric, "greater_is_better": order.greater_is_better,
            "policy_version": policy["version"], "champion": champion, "entries": entries,
            "next_cursor": None if cursor is None else board.encode_cursor(cursor),
            "holdout_policies": released_under, "mixed_policies": board.mixed_policies_note(released_under),
        })
