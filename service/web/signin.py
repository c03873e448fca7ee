"""Sign in with a key, sign out.

The sign-in form posts the key once; a valid, unrevoked key starts a session and the browser goes
on to the page it first asked for (``next``, only ever a local desk path). A wrong key gets the
form again with one message that does not say whether the key exists or was revoked.
"""

from __future__ import annotations

from flask import redirect, request, url_for
from werkzeug.wrappers import Response

from service.api import service_context
from service.records import keys
from service.report.markup import element
from service.web.guard import desk, signed_in
from service.web.layout import page
from service.web.session import (
    CSRF_FIELD,
    DeskSession,
    csrf_matches,
    csrf_token,
    current_session,
    end_session,
    safe_next,
    sign_in_nonce,
    start_session,
)


@desk.get("/sign-in")
def sign_in() -> Response:
    target = safe_next(request.args.get("next"))
    if current_session() is not None:
        return redirect(target, 303)
    return _form(target, None, 200)


@desk.post("/sign-in")
def sign_in_post() -> Response:
    target = safe_next(request.form.get("next"))
    if not csrf_matches(sign_in_nonce()):
        return _form(target, "The form was refused: its security token is missing or out of date. "
                     "Send it again from this page.", 403)
    token = request.form.get("key", "").strip()
    info = keys.authenticate(service_context().engine, token) if token else None
    if info is None:
        return _form(target, "That key is not valid or has been revoked. Check it and try again.", 401)
    response = redirect(target, 303)
    start_session(response, info)
    return response


@desk.post("/sign-out")
@signed_in()
def sign_out(session: DeskSession) -> Response:
    response = page("Signed out", None, element("p", {"class": "done", "role": "status"}, "You are signed out."),
                    element("p", None, element("a", {"href": url_for("desk.sign_in")}, "Sign in again")))
    end_session(response)
    return response


def _form(target: str, problem: str | None, status: int) -> Response:
    response = page("Sign in", None)  # replaced below; made first so the sign-in cookie can be set on it
    nonce = sign_in_nonce(response)
    form = element(
        "form", {"method": "post", "action": url_for("desk.sign_in_post"), "class": "stack"},
        element("input", {"type": "hidden", "name": CSRF_FIELD, "value": csrf_token(nonce)}),
        element("input", {"type": "hidden", "name": "next", "value": target}),
        element("label", {"for": "key"}, "Your key",
                element("span", {"class": "hint"}, "the API key you were given; it stays in this server")),
        element("input", {"type": "password", "id": "key", "name": "key", "autocomplete": "current-password",
                          "required": True, "autofocus": True, "aria-invalid": "true" if problem else None,
                          "aria-describedby": "key-problem" if problem else None}),
        element("span", {"class": "field-error", "id": "key-problem"}, problem) if problem else None,
        element("button", {"type": "submit"}, "Sign in"))
    intro = element("p", {"class": "lead"}, "Sign in to read the boards and reports of your team's datasets.")
    shown = page("Sign in", None, intro, form, status=status)
    for header in response.headers.getlist("Set-Cookie"):
        shown.headers.add("Set-Cookie", header)
    return shown
