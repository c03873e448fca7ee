"""Admin pages: the team's keys, creating one (its token shown once) and revoking one."""

from __future__ import annotations

from flask import redirect, request, url_for
from marshmallow import ValidationError
from werkzeug.wrappers import Response

from service import team_scope
from service.api import service_context
from service.api.schemas import KeyCreateSchema
from service.records import audit, keys
from service.report.markup import Markup, element
from service.vocabulary import ROLES
from service.web.guard import desk, signed_in
from service.web.layout import csrf_field, facts, page, table, when
from service.web.session import DeskSession


@desk.get("/keys")
@signed_in("admin")
def key_list(session: DeskSession) -> Response:
    return _keys_page(session, None, [])


@desk.post("/keys")
@signed_in("admin")
def key_create(session: DeskSession) -> Response:
    engine = service_context().engine
    try:
        body = KeyCreateSchema().load({"role": request.form.get("role", ""), "name": request.form.get("name", "")})
    except ValidationError as refused:
        messages = [f"{field}: {' '.join(map(str, texts))}" for field, texts in refused.normalized_messages().items()]
        return _keys_page(session, None, messages, 422)
    info, token = keys.create_key(engine, session.key.team, body["role"], body["name"])
    audit.record(engine, session.key.id, session.key.team, "key.created", info.id,
                 {"role": info.role, "name": info.name})
    shown = element("div", {"class": "done", "role": "status"},
                    element("p", None, f"Created {info.role} key {info.name or info.id}. Its token is below; it is "
                                       "shown this once and never again, so hand it over now."),
                    facts([("key", info.id), ("token", element("code", None, token))]))
    return _keys_page(session, shown, [], 201)


@desk.post("/keys/<key_id>/revoke")
@signed_in("admin")
def key_revoke(session: DeskSession, key_id: str) -> Response:
    ctx = service_context()
    engine = ctx.engine
    team_scope.team_key(engine, session.key, key_id)
    keys.revoke(engine, key_id)
    ctx.verified_keys.forget(key_id)  # other API processes forget it within key_cache_seconds
    audit.record(engine, session.key.id, session.key.team, "key.revoked", key_id, {})
    return redirect(url_for("desk.key_list"), 303)


def _keys_page(session: DeskSession, shown: Markup | None, problems: list[str], status: int = 200) -> Response:
    listing = keys.team_listing(service_context().engine, session.key.team)
    rows = []
    for k in listing:
        revoke = "revoked " + when(str(k["revoked_at"])) if k["revoked_at"] else element(
            "form", {"method": "post", "action": url_for("desk.key_revoke", key_id=str(k["id"]))}, csrf_field(session),
            element("button", {"type": "submit", "class": "quiet", "aria-label": f"revoke {k['name'] or k['id']}"},
                    "Revoke"))
        rows.append([k["name"] or "-", k["id"], k["role"], when(str(k["created_at"] or "")), revoke])
    form = element(
        "form", {"method": "post", "action": url_for("desk.key_create"), "class": "stack"}, csrf_field(session),
        element("label", {"for": "key-name"}, "Name", element("span", {"class": "hint"}, "who or what will use it")),
        element("input", {"type": "text", "id": "key-name", "name": "name", "maxlength": 200}),
        element("label", {"for": "key-role"}, "Role"),
        element("select", {"id": "key-role", "name": "role"}, [element("option", {"value": r}, r) for r in ROLES]),
        element("button", {"type": "submit"}, "Create the key"))
    alert = element("div", {"class": "problem", "role": "alert"}, element("ul", None, [
        element("li", None, p) for p in problems])) if problems else None
    return page("Keys", session, shown, alert,
                table(f"Keys of team {session.key.team}, newest first", ["name", "key", "role", "created", ""], rows),
                element("h2", None, "Create a key"), form, status=status)
