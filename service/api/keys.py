"""Key endpoints (admin): create a key and show its token once, revoke a key.

A key may name whose it is (``identity``: a person or a CI identity); holdout budgets are counted per
identity and per team, so minting keys creates no budget.

An admin manages its own team's keys; a key of another team is a 404 like any unknown id. Keys
for a new team are made with the command line, which has the records DB at hand.
"""

from __future__ import annotations

from typing import Any

from flask import Response
from flask.views import MethodView

from service import team_scope
from service.api import SealfoldBlueprint, json_response, service_context
from service.api.auth import current_key
from service.api.schemas import KeyCreatedSchema, KeyCreateSchema
from service.errors import Forbidden
from service.records import audit, keys

blp = SealfoldBlueprint("keys", __name__, url_prefix="/v1/keys", description="Manage API keys (admin).")


@blp.route("")
class KeyCollection(MethodView):
    @blp.requires("admin")
    @blp.arguments(KeyCreateSchema)
    @blp.response(201, KeyCreatedSchema, headers={"Location": {"schema": {"type": "string"}}})
    @blp.problem(422, "Unknown role, or a bad team, name or identity")
    def post(self, body: dict[str, Any]) -> Response:
        """Create a key; the token is in this answer and nowhere else, ever."""
        caller, engine = current_key(), service_context().engine
        team = caller.team if body["team"] is None else body["team"].strip()
        if team != caller.team:
            raise Forbidden(f"an admin key manages keys of its own team {caller.team!r}, not {team!r}; "
                            "create keys for another team with the command line")
        info, token = keys.create_key(engine, team, body["role"], body["name"], body["identity"])
        audit.record(engine, caller.id, team, "key.created", info.id,
                     {"role": info.role, "name": info.name, "identity": info.identity or None})
        document = {"id": info.id, "team": info.team, "role": info.role, "name": info.name,
                    "identity": info.identity or None, "token": token}
        return json_response(document, 201, {"Location": f"/v1/keys/{info.id}", "Cache-Control": "no-store"})


@blp.route("/<key_id>")
class KeyItem(MethodView):
    @blp.requires("admin")
    @blp.response(204, description="Revoked (revoking twice is not an error)")
    @blp.problem(404, "No such key in the caller's team")
    def delete(self, key_id: str) -> Response:
        """Revoke a key; requests with its token are refused from now on."""
        caller, ctx = current_key(), service_context()
        engine = ctx.engine
        team_scope.team_key(engine, caller, key_id)
        keys.revoke(engine, key_id)
        ctx.verified_keys.forget(key_id)  # other API processes forget it within key_cache_seconds
        audit.record(engine, caller.id, caller.team, "key.revoked", key_id, {})
        return Response(status=204)
