"""A submission's report inside the desk: the same page the API serves, with the desk's links on top."""

from __future__ import annotations

from flask import request, url_for
from werkzeug.wrappers import Response

from service import team_scope
from service.api import service_context
from service.report import gather, render_report
from service.report.markup import Markup, element
from service.web.guard import desk, signed_in
from service.web.layout import csrf_field, html_response
from service.web.session import DeskSession


@desk.get("/submissions/<sub_id>/report")
@signed_in()
def report(session: DeskSession, sub_id: str) -> Response:
    engine = service_context().engine
    row = team_scope.team_submission(engine, session.key, sub_id)
    return html_response(render_report(gather(engine, row), request.host_url.rstrip("/"),
                                       nav=_nav(session, row["dataset_id"])))


def _nav(session: DeskSession, ds_id: str) -> Markup:
    sign_out = element("form", {"method": "post", "action": url_for("desk.sign_out"), "class": "inline"},
                       csrf_field(session), element("button", {"type": "submit"}, "Sign out"))
    return element("nav", {"class": "desk", "aria-label": "desk"},
                   element("a", {"href": url_for("desk.dataset_page", ds_id=ds_id) + "#board"}, "Back to the board"),
                   " \u00b7 ", element("a", {"href": url_for("desk.datasets")}, "Datasets"), " \u00b7 ",
                   f"signed in as {session.key.name or session.key.id} ", sign_out)
