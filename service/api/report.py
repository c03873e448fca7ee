"""The report page of a submission: server-rendered HTML for people, beside the JSON for programs.

The page is built by ``service.report`` from the records; this module scopes it to the caller's
team and serves it with a Content-Security-Policy that allows no script and no outside resource
(the page needs neither), as a second line of defence behind the escaping.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any, TypeVar, cast

from flask import Response, redirect, request, url_for
from flask.views import MethodView

from service.api import SealfoldBlueprint, service_context
from service.api.auth import current_key, team_submission
from service.report import gather, render_report

blp = SealfoldBlueprint("reports", __name__, url_prefix="/v1/submissions",
                        description="Human-readable review reports.")

_View = TypeVar("_View", bound=Callable[..., Any])

CONTENT_SECURITY_POLICY = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; " \
                          "form-action 'none'; frame-ancestors 'none'"


def _browsers_go_to_the_desk(view: _View) -> _View:
    """Send a browser that opened a report link without a key to the desk's report page.

    Only a request without an Authorization header that prefers HTML is redirected, before any key
    check; the desk then asks it to sign in. Programs (Accept other than HTML first) keep their 401.
    """

    @functools.wraps(view)
    def wrapper(self: Any, sub_id: str) -> Any:
        wants_html = request.accept_mimetypes.best_match(["application/json", "text/html"]) == "text/html"
        if wants_html and not request.headers.get("Authorization"):
            return redirect(url_for("desk.report", sub_id=sub_id), 303)
        return view(self, sub_id)

    return cast(_View, wrapper)


@blp.route("/<sub_id>/report")
class SubmissionReport(MethodView):
    @_browsers_go_to_the_desk
    @blp.requires("submitter")
    @blp.doc(responses={"200": {"description": "The report page (HTML with inline SVG charts, no script)",
                                "content": {"text/html": {"schema": {"type": "string"}}}},
                        "303": {"description": "A browser without a key (no Authorization header, HTML preferred) "
                                               "is sent to the report page of the browser desk, which signs it in",
                                "headers": {"Location": {"schema": {"type": "string"}}}}})
    @blp.problem(404, "No such submission in the caller's team")
    def get(self, sub_id: str) -> Response:
        """Read the review report of a submission: verdict and reasons, fold chart, intervals, provenance."""
        row = team_submission(current_key(), sub_id)
        page = render_report(gather(service_context().engine, row), request.host_url.rstrip("/"))
        response = Response(page, mimetype="text/html")
        response.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
        response.headers["X-Content-Type-Options"] = "nosniff"
        response.headers["Cache-Control"] = "private, no-cache"
        return response
