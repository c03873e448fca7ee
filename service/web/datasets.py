"""The team's datasets, and one dataset's page: its columns, seal, policy, champion and board.

Everything shown is read through the functions the JSON API answers from: the dataset as the
caller's role may read it (``records.datasets.public_view``: the balance table for stewards only),
the policy in force, the champion state, and the board with holdout figures as released.
"""

from __future__ import annotations

from typing import Any

from flask import request, url_for
from werkzeug.wrappers import Response

from service.api import service_context
from service.api.auth import team_dataset
from service.gate.board import board_document
from service.gate.review_state import champion_state, policy_in_force
from service.records import datasets as dataset_records
from service.records import keys, policies, submissions
from service.records.engine import iso
from service.report.columns import development_missing
from service.report.markup import Markup, element
from service.web.board_view import board_section
from service.web.guard import desk, signed_in
from service.web.layout import facts, page, table, when
from service.web.policy_view import policy_facts, policy_history
from service.web.session import DeskSession


@desk.get("/")
@signed_in()
def datasets(session: DeskSession) -> Response:
    engine = service_context().engine
    listed = datasets_for(session)
    active = submissions.last_activity(engine, session.key.team)
    rows = []
    for ds in listed:
        champion = champion_state(engine, ds["id"])["champion"]
        balance = ds.get("balance") or {}
        rows.append([
            element("a", {"href": url_for("desk.dataset_page", ds_id=ds["id"])}, ds["name"]),
            ds["task"],
            f"{ds['rows']['development']} / {ds['rows']['holdout']}",
            _plan(ds["fold_plan"]),
            "balanced" if balance.get("balanced") else "not balanced" if balance else "-",
            (champion["label"] or champion["submission"]) if champion else "none yet",
            when(iso(active.get(ds["id"])) or ds["created_at"]),
        ])
    return page("Datasets", session,
                element("p", {"class": "lead"}, f"The datasets of team {session.key.team}, newest first."),
                table("Datasets", ["name", "task", "rows: development / holdout", "fold plan",
                                   "holdout balance", "champion", "last activity"], rows))


def datasets_for(session: DeskSession) -> list[dict[str, Any]]:
    """The team's datasets as the caller's role may read them."""
    return dataset_records.list_for_team(service_context().engine, session.key.team, role=session.key.role)


@desk.get("/datasets/<ds_id>")
@signed_in()
def dataset_page(session: DeskSession, ds_id: str) -> Response:
    engine, settings = service_context().engine, service_context().settings
    ds = team_dataset(session.key, ds_id)
    per_page = _per_page(request.args.get("per"))
    cursor = request.args.get("cursor") or None
    board = board_document(engine, ds, per_page, cursor)
    policy = policy_in_force(engine, ds)
    champions = champion_state(engine, ds["id"])
    names = {str(k["id"]): str(k["name"] or k["id"]) for k in keys.team_listing(engine, session.key.team)}
    sections = [
        element("p", {"class": "lead"}, f"{ds['task']} on {ds['target']} \u00b7 registered {when(ds['created_at'])}"),
        facts([("rows", f"{ds['rows']['total']} in all: {ds['rows']['development']} for development, "
                        f"{ds['rows']['holdout']} sealed as the holdout"),
               ("fold plan", _plan(ds["fold_plan"])),
               ("holdout drawn", f"{ds['holdout']['scheme']}, {ds['holdout']['fraction']:g} of the rows")]),
        board_section(session, ds, board, per_page, cursor is not None),
        _champion_section(ds, champions, names),
        element("h2", {"id": "policy"}, "Review policy"),
        policy_facts(policy),
        element("p", None, element("a", {"href": url_for("desk.policy_form", ds_id=ds["id"])}, "Edit the policy"))
        if session.key.can("steward") else None,
        policy_history(policies.history(engine, ds["id"]), names),
        _columns_section(ds, development_missing(settings, ds["id"])),
        _balance_section(ds),
    ]
    return page(ds["name"], session, *sections)


def _per_page(raw: str | None) -> int:
    try:
        value = int(raw or 20)
    except ValueError:
        return 20
    return min(max(value, 1), 200)


def _plan(plan: dict[str, Any]) -> str:
    return f"{plan['scheme']}, {plan['folds']} folds"


def _champion_section(ds: dict[str, Any], state: dict[str, Any], names: dict[str, str]) -> Markup:
    champion = state["champion"]
    now = element("p", None, "No champion yet." if champion is None else [
        "Champion in force: ", element("a", {"href": url_for("desk.report", sub_id=champion["submission"])},
                                       champion["label"] or champion["submission"]),
        f", promoted {when(champion['promoted_at'])}."])
    engine = service_context().engine
    rows = [[element("a", {"href": url_for("desk.report", sub_id=h["submission"])}, _label(engine, h["submission"])),
             names.get(h["promoted_by"], h["promoted_by"]), when(h["promoted_at"])] for h in state["history"]]
    return element("section", {"aria-labelledby": "champion"}, element("h2", {"id": "champion"}, "Champion"), now,
                   table("Promotions, newest first", ["submission", "promoted by", "when"], rows))


def _label(engine: Any, sub_id: str) -> str:
    row = submissions.get(engine, sub_id)
    return str(row["label"] or sub_id) if row else sub_id


def _columns_section(ds: dict[str, Any], missing: dict[str, int] | None) -> Markup:
    roles = {ds["target"]: "target", ds.get("group_column"): "group", ds.get("time_column"): "time",
             ds.get("id_column"): "row id"}
    rows = [[c["name"], roles.get(c["name"], "feature"), c["kind"],
             "-" if missing is None else missing.get(c["name"], 0)] for c in ds.get("columns") or []]
    return element("section", {"aria-labelledby": "columns"}, element("h2", {"id": "columns"}, "Columns"),
                   table("Columns; missing values are counted in the development rows only", ["column", "used as",
                         "kind", "missing values"], rows))


def _balance_section(ds: dict[str, Any]) -> Markup:
    balance = ds.get("balance")
    heading = element("h2", {"id": "balance"}, "Balance of the seal")
    if not balance:
        return element("section", None, heading, element("p", {"class": "note"}, "No balance check recorded."))
    auc = balance.get("adversarial_auc")
    summary = element("p", None, (
        f"{'Balanced' if balance.get('balanced') else 'Not balanced'}: a classifier told development rows from "
        f"holdout rows with an AUC of {auc:.3f} (0.5 means it could not tell them apart), after "
        f"{balance.get('draws')} draw(s) of the holdout.") if isinstance(auc, float) else
        f"{'Balanced' if balance.get('balanced') else 'Not balanced'}.")
    parts: list[object] = [heading, summary]
    if "columns" in balance:  # the per-column table: stewards only, as the API shapes it
        rows = [[c["name"], c.get("role", ""), _f(c.get("smd")), _f(c.get("smd_allowed")), _f(c.get("ks")),
                 _f(c.get("ks_pvalue")), _f(c.get("tv")), ", ".join(_STATISTICS.get(str(x), str(x))
                                                                for x in c.get("exceeds") or []) or "none"]
                for c in balance["columns"]]
        parts.append(table("Per column, development against holdout (stewards only)",
                           ["column", "used as", "standardised mean difference", "allowed", "KS distance",
                            "KS p-value", "total variation", "beyond its limit"], rows))
        draws = [[a.get("draw"), "yes" if a.get("balanced") else "no", _f(a.get("adversarial_auc")),
                  _exceeded(a.get("exceeded") or [])] for a in balance.get("attempts") or []]
        parts.append(table("Every draw of the holdout", ["draw", "balanced", "adversarial AUC",
                                                          "columns beyond their limit"], draws))
    return element("section", {"aria-labelledby": "balance"}, parts)


_STATISTICS = {"smd": "mean difference", "ks": "KS distance", "tv": "total variation",
               "adversarial_auc": "adversarial AUC"}


def _exceeded(items: list[Any]) -> str:
    said = []
    for item in items:
        if isinstance(item, dict):
            stat = _STATISTICS.get(str(item.get("statistic")), str(item.get("statistic")))
            said.append(f"{item['column']}: {stat}" if item.get("column") else stat)
        else:
            said.append(str(item))
    return ", ".join(said) or "none"


def _f(value: Any) -> object:
    return float(value) if isinstance(value, int | float) and not isinstance(value, bool) else "-"
