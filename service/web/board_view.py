"""The board on a dataset's page: ranked, paged, champion marked, with the compare and promote links.

The rows are ``gate.board.board_document``'s, the same the API serves: the holdout column shows
only what the release policy released, in the words the board composed for it.
"""

from __future__ import annotations

from typing import Any

from flask import url_for

from service.report.charts import figure
from service.report.markup import Markup, element
from service.web.layout import decision_tag, when
from service.web.session import DeskSession


def board_section(session: DeskSession, ds: dict[str, Any], board: dict[str, Any], per_page: int,
                  paged: bool) -> Markup:
    """The board heading, its table inside the compare form, and the pager."""
    metric = board["primary_metric"]
    direction = "higher is better" if board["greater_is_better"] else "lower is better"
    heading = element("h2", {"id": "board"}, "Board")
    lead = element("p", {"class": "note"},
                   f"Ranked by the cross-validation mean of {metric} ({direction}) under policy version "
                   f"{board['policy_version']}. The holdout column shows only what the release policy released, "
                   "and says what each figure is.")
    entries = board["entries"]
    if not entries:
        return element("section", {"aria-labelledby": "board"}, heading, lead,
                       element("p", {"class": "note"}, "No submission on the board yet."))
    steward = session.key.can("steward")
    headers = ["rank", "submission", f"CV mean {metric} (\u00b1 fold std)", "holdout (as released)", "verdict",
               "judged under policy", "submitted by", "compare: A", "B"]
    if steward:
        headers.append("champion")
    rows = [_row(e, steward, ds["id"]) for e in entries]
    head = element("tr", None, [element("th", {"scope": "col"}, h) for h in headers])
    grid = element("div", {"class": "scroll"}, element(
        "table", None, element("caption", None, f"Board of {ds['name']}, {len(entries)} on this page"),
        element("thead", None, head), element("tbody", None, rows)))
    form = element("form", {"method": "get", "action": url_for("desk.compare_page")}, grid,
                   element("button", {"type": "submit"}, "Compare A with B"))
    mixed = element("p", {"class": "note"}, board["mixed_policies"]) if board.get("mixed_policies") else None
    return element("section", {"aria-labelledby": "board"}, heading, lead, mixed, form,
                   _pager(ds["id"], board.get("next_cursor"), per_page, paged))


def _row(entry: dict[str, Any], steward: bool, ds_id: str) -> Markup:
    sub, label = entry["submission"], entry["label"] or entry["submission"]
    cv = entry["cv"]
    spread = f" \u00b1 {figure(cv['std'])}" if cv.get("std") is not None else ""
    name: list[object] = [element("a", {"href": url_for("desk.report", sub_id=sub)}, label)]
    if entry["champion"]:
        name += [" ", element("span", {"class": "tag champion"}, "champion")]
    cells: list[object] = [
        element("td", {"class": "num"}, str(entry["rank"])), element("td", None, name),
        element("td", {"class": "num"}, f"{figure(cv['mean'])}{spread}"),
        element("td", None, _holdout(entry["holdout"])),
        element("td", None, decision_tag(entry["verdict"])),
        element("td", None, "-" if entry["policy_version"] is None else f"version {entry['policy_version']}"),
        element("td", None, entry["submitter"]["name"] or entry["submitter"]["key"], element("br", None),
                element("span", {"class": "note"}, when(entry["created_at"]))),
        element("td", None, _pick("a", sub, label)), element("td", None, _pick("b", sub, label)),
    ]
    if steward:
        can = entry["verdict"] == "pass" and not entry["champion"]
        cells.append(element("td", None, element("a", {"href": url_for("desk.promote_form", ds_id=ds_id,
                                                                        submission=sub)}, "promote\u2026")
                             if can else ("in force" if entry["champion"] else "-")))
    return element("tr", {"class": "champion" if entry["champion"] else None}, cells)


_FIGURES = {"own_score": "this submission's score, rounded", "thresholdout_answer": "thresholdout's answer"}


def _holdout(holdout: dict[str, Any]) -> Markup:
    """The released figure first, then what it is; the board's own sentence when nothing is shown."""
    if not holdout["released"] or holdout["score"] is None:
        return element("span", {"class": "note"}, holdout["summary"])
    ladder = holdout.get("ladder")
    if ladder is not None:
        what = ("new best: this submission set the dataset's best so far" if ladder["new_best"] else
                "the dataset's best so far, not this submission's")
    else:
        what = _FIGURES.get(str(holdout["figure"]), str(holdout["summary"]))
    version = holdout.get("policy_version")
    return element("span", None, element("strong", None, figure(holdout["score"])), element("br", None),
                   element("span", {"class": "note"}, f"{what} ({holdout['mode']}"
                           + (f", policy version {version})" if version is not None else ")")))


def _pick(side: str, sub: str, label: str) -> Markup:
    return element("input", {"type": "radio", "name": side, "value": sub,
                             "aria-label": f"compare {label} as {side.upper()}"})


def _pager(ds_id: str, next_cursor: str | None, per_page: int, paged: bool) -> Markup:
    links = []
    if paged:
        links.append(element("a", {"href": url_for("desk.dataset_page", ds_id=ds_id, per=per_page) + "#board"},
                             "First page"))
    if next_cursor:
        links.append(element("a", {"href": url_for("desk.dataset_page", ds_id=ds_id, per=per_page,
                                                   cursor=next_cursor) + "#board", "rel": "next"}, "Next page"))
    return element("nav", {"class": "pager", "aria-label": "board pages"}, links)
