"""Steward pages: edit a dataset's policy, promote a champion (after a confirmation), read the audit trail."""

from __future__ import annotations

from typing import Any

from flask import redirect, request, url_for
from werkzeug.wrappers import Response

from service import team_scope
from service.api import service_context
from service.api.auth import team_dataset
from service.errors import InputError
from service.gate import promotion
from service.gate.policy import parse_policy
from service.gate.review_state import champion_state, policy_in_force
from service.records import audit, keys, policies
from service.report.markup import Markup, element
from service.web.guard import desk, signed_in
from service.web.layout import csrf_field, decision_tag, page, table, when
from service.web.policy_form import FIELDS, Field, choices, document_from_form, form_values, problems_by_field
from service.web.session import DeskSession


@desk.get("/datasets/<ds_id>/policy")
@signed_in("steward")
def policy_form(session: DeskSession, ds_id: str) -> Response:
    ds = team_dataset(session.key, ds_id)
    return _policy_page(session, ds, form_values(policy_in_force(service_context().engine, ds)), {}, [])


@desk.post("/datasets/<ds_id>/policy")
@signed_in("steward")
def policy_save(session: DeskSession, ds_id: str) -> Response:
    engine = service_context().engine
    ds = team_dataset(session.key, ds_id)
    sent = {f.name: request.form.get(f.name, "") for f in FIELDS}
    try:
        document = parse_policy(document_from_form(sent), str(ds["task"])).to_document(0)
    except InputError as refused:
        placed, loose = problems_by_field(refused.problems or [])
        return _policy_page(session, ds, sent, placed, loose or ([] if placed else [refused.detail]), 422)
    del document["version"]  # the records assign it
    policies.put(engine, ds["id"], document, session.key.id)
    return redirect(url_for("desk.dataset_page", ds_id=ds["id"]) + "#policy", 303)


def _policy_page(session: DeskSession, ds: dict[str, Any], values: dict[str, str], placed: dict[str, list[str]],
                 loose: list[str], status: int = 200) -> Response:
    inputs = [_input(f, values.get(f.name, ""), placed.get(f.name, []), str(ds["task"])) for f in FIELDS]
    summary = None
    if placed or loose:
        summary = element("div", {"class": "problem", "role": "alert"},
                          element("p", None, "The policy was not saved. Fix these and send it again:"),
                          element("ul", None, [element("li", None, m) for ms in placed.values() for m in ms],
                                  [element("li", None, m) for m in loose]))
    form = element("form", {"method": "post", "action": url_for("desk.policy_save", ds_id=ds["id"]),
                            "class": "stack", "novalidate": True},
                   csrf_field(session), inputs, element("button", {"type": "submit"}, "Save as a new version"))
    return page(f"Policy of {ds['name']}", session,
                element("p", {"class": "lead"}, "Saving stores a new version; it judges submissions made from now "
                        "on. Fields left as they are keep their values."),
                summary, form,
                element("p", None, element("a", {"href": url_for("desk.dataset_page", ds_id=ds["id"])}, "Cancel")),
                status=status)


def _input(field: Field, value: str, messages: list[str], task: str) -> Markup:
    ident = "f-" + field.name.replace(".", "-")
    hint_id, error_id = f"{ident}-hint", f"{ident}-error"
    described = hint_id + (f" {error_id}" if messages else "")
    attrs = {"id": ident, "name": field.name, "aria-describedby": described,
             "aria-invalid": "true" if messages else None}
    if field.kind == "choice":
        control = element("select", attrs, [element("option", {"value": c, "selected": c == value}, c)
                                            for c in choices(field, task)])
    else:
        control = element("input", {"type": "text", "inputmode": "decimal", "value": value, **attrs})
    return element("div", None,
                   element("label", {"for": ident}, field.label, element("span", {"class": "hint", "id": hint_id},
                                                                         field.hint)),
                   control,
                   element("span", {"class": "field-error", "id": error_id}, " ".join(messages)) if messages else None)


@desk.get("/datasets/<ds_id>/promote")
@signed_in("steward")
def promote_form(session: DeskSession, ds_id: str) -> Response:
    engine = service_context().engine
    ds = team_dataset(session.key, ds_id)
    sub = team_scope.team_submission(engine, session.key, request.args.get("submission", ""))
    current = champion_state(engine, ds["id"])["champion"]
    form = element("form", {"method": "post", "action": url_for("desk.promote", ds_id=ds["id"])},
                   csrf_field(session), element("input", {"type": "hidden", "name": "submission", "value": sub["id"]}),
                   element("button", {"type": "submit"}, "Yes, promote it"))
    return page("Promote a champion?", session,
                element("p", None, "Make ", element("strong", None, sub["label"] or sub["id"]), " (verdict ",
                        decision_tag((sub.get("verdict") or {}).get("decision")), ") the champion of ",
                        element("strong", None, ds["name"]), "?"),
                element("p", None, "The champion now is " + (current["label"] or current["submission"])
                        if current else "There is no champion yet."),
                element("p", {"class": "note"}, "Later submissions are judged against the champion. The previous "
                        "one stays in the history, and the promotion is recorded in the audit trail."),
                form, element("p", None, element("a", {"href": url_for("desk.dataset_page", ds_id=ds["id"])},
                                                 "No, go back")))


@desk.post("/datasets/<ds_id>/promote")
@signed_in("steward")
def promote(session: DeskSession, ds_id: str) -> Response:
    ds = team_dataset(session.key, ds_id)
    promotion.promote(service_context().engine, session.key, ds, request.form.get("submission", ""))
    return redirect(url_for("desk.dataset_page", ds_id=ds["id"]) + "#champion", 303)


_ACTIONS = {"policy.set": "set a policy", "champion.promoted": "promoted a champion",
            "dataset.registered": "registered a dataset", "submission.created": "submitted",
            "key.created": "created a key", "key.revoked": "revoked a key", "submission.canceled": "canceled",
            "holdout.scored": "scored on the holdout", "holdout.failed": "holdout scoring failed",
            "holdout.released": "released a holdout figure"}


@desk.get("/audit")
@signed_in("steward")
def audit_trail(session: DeskSession) -> Response:
    engine = service_context().engine
    names = {k["id"]: k["name"] or k["id"] for k in keys.team_listing(engine, session.key.team)}
    events = audit.recent_for_team(engine, session.key.team)
    rows = [[when(e["at"]), names.get(e["actor"], e["actor"]), _ACTIONS.get(e["action"], e["action"]),
             _subject(str(e["subject"])), _detail(e)] for e in events]
    return page("Audit trail", session,
                element("p", {"class": "lead"}, f"What was done in team {session.key.team}, newest first "
                        f"(the latest {len(rows)})."),
                table("Audit events", ["when", "by", "action", "on", "details"], rows))


def _subject(subject: str) -> object:
    if subject.startswith("ds_"):
        return element("a", {"href": url_for("desk.dataset_page", ds_id=subject)}, subject)
    if subject.startswith("sub_"):
        return element("a", {"href": url_for("desk.report", sub_id=subject)}, subject)
    return subject


def _detail(event: dict[str, Any]) -> str:
    """A few safe words per action; the details of holdout events are never shown (they may hold figures)."""
    detail = event.get("detail") or {}
    if event["action"] == "policy.set":
        return f"version {detail.get('version')}"
    if event["action"] == "champion.promoted":
        previous = detail.get("previous")
        return f"{detail.get('submission')}" + (f", replacing {previous}" if previous else ", the first champion")
    if event["action"] == "key.created":
        return f"{detail.get('role')} key {detail.get('name') or ''}".strip()
    if event["action"] == "submission.created":
        return f"on {detail.get('dataset')}"
    return ""
