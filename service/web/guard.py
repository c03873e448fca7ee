"""The desk blueprint, the decorator every page wears, and the pages errors become.

``signed_in(role)`` sends a browser without a session to the sign-in page (remembering the page it
asked for), answers 403 to a key whose role is too weak, and refuses a POST whose CSRF token is
missing or wrong. Errors of the core (not found, refused input) become HTML pages, not JSON.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any, TypeVar, cast

from flask import Blueprint, redirect, request, url_for
from werkzeug.wrappers import Response

from service.errors import SealfoldError
from service.report.markup import element
from service.web.layout import page
from service.web.session import PREFIX, DeskSession, csrf_matches, current_session

desk = Blueprint("desk", __name__, url_prefix=PREFIX)

_View = TypeVar("_View", bound=Callable[..., Any])


def signed_in(role: str = "submitter") -> Callable[[_View], _View]:
    """Run the view with the caller's ``DeskSession`` as its first argument, or answer for it."""

    def decorator(view: _View) -> _View:
        @functools.wraps(view)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            session = current_session()
            if session is None:
                wanted = request.full_path.rstrip("?") if request.method == "GET" else None
                return redirect(url_for("desk.sign_in", next=wanted), 303)
            if request.method == "POST" and not csrf_matches(session.nonce):
                return refused(session, "The form was refused: its security token is missing or out of date. "
                               "Go back, reload the page and send the form again.")
            if not session.key.can(role):
                return refused(session, f"This page needs a {role} key; you are signed in with a "
                               f"{session.key.role} key.")
            return view(session, *args, **kwargs)

        return cast(_View, wrapper)

    return decorator


def refused(session: DeskSession | None, text: str) -> Response:
    """The 403 page."""
    return page("Not allowed", session, element("p", {"class": "problem", "role": "alert"}, text), status=403)


@desk.errorhandler(SealfoldError)
def _error_page(error: SealfoldError) -> Response:
    status = error.status if 400 <= error.status < 600 else 500
    title = {404: "Not found", 403: "Not allowed"}.get(status, "Cannot do that")
    return page(title, current_session(), element("p", {"class": "problem", "role": "alert"}, error.detail),
                element("p", None, element("a", {"href": url_for("desk.datasets")}, "Back to the datasets")),
                status=status)
