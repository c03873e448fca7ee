"""Rank a dataset's submissions by the primary cross-validation metric of the policy in force.

The ranking runs in SQL on the stored summaries (a JSON path the SQLite and PostgreSQL dialects
both translate), one page at a time with a keyset cursor, so a long board never loads every
result. The holdout figure shown is the one the release mechanism released -- the raw score in
``holdout_scores`` is never read here -- labelled with the policy it was released under and, under
the ladder, as the dataset's best so far rather than the row's own score. Failed and canceled
submissions are not on the board, nor those without a CV mean of the primary metric (still queued,
or scored on other metrics).
"""

from __future__ import annotations

import base64
import binascii
import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine, and_, case, func, or_, select
from sqlalchemy.sql.elements import ColumnElement

from service.errors import InputError, field_error
from service.gate.review_state import holdout_summary, ladder_reading, policy_in_force
from service.records import champions
from service.records.engine import iso, utcnow
from service.records.tables import api_keys, holdout_releases, submissions
from service.vocabulary import HOLDOUT_FIGURES, RELEASE_MODES


@dataclass(frozen=True)
class BoardOrder:
    """How a board is ranked: by ``metric``'s CV mean, best first in the metric's direction."""

    metric: str
    greater_is_better: bool


@dataclass(frozen=True)
class BoardCursor:
    """Where a page ended: the last entry's CV mean and id, and how many entries came before it."""

    order: BoardOrder
    mean: float
    submission_id: str
    position: int


def encode_cursor(cursor: BoardCursor) -> str:
    """Return the opaque text a client sends back as ``?cursor=``."""
    raw = json.dumps([cursor.order.metric, cursor.order.greater_is_better, cursor.mean,
                      cursor.submission_id, cursor.position])
    return base64.urlsafe_b64encode(raw.encode("utf-8")).decode("ascii").rstrip("=")


def decode_cursor(text: str, order: BoardOrder) -> BoardCursor:
    """Parse a cursor of ``encode_cursor``; one from a board ranked another way is a 422 on /cursor."""
    try:
        raw = base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))
        metric, greater, mean, sub_id, position = json.loads(raw)
        valid = (isinstance(metric, str) and isinstance(greater, bool) and isinstance(sub_id, str)
                 and isinstance(mean, int | float) and not isinstance(mean, bool)
                 and isinstance(position, int) and position >= 0)
    except (binascii.Error, ValueError, TypeError, UnicodeDecodeError):
        valid = False
    if not valid:
        raise field_error(InputError, "/cursor", f"cursor must be a next_cursor from an earlier page of this "
                          f"board, got {text[:40]!r}")
    if (metric, greater) != (order.metric, order.greater_is_better):
        raise field_error(InputError, "/cursor", f"this cursor belongs to a board ranked by {metric!r}; the "
                          f"policy now ranks by {order.metric!r}, so start again from the first page")
    return BoardCursor(order, float(mean), sub_id, position)


def board_page(
    engine: Engine, dataset: dict[str, Any], order: BoardOrder, limit: int, after: BoardCursor | None = None,
    champion_id: str | None = None, policy_version: int | None = None,
) -> tuple[list[dict[str, Any]], BoardCursor | None]:
    """Return one page of board entries and the cursor of the next page (None on the last page).

    ``dataset`` is the caller's team's dataset as ``service.team_scope.team_dataset`` returned it;
    ``policy_version`` is the version in force, so each entry says whether it was judged under it.
    """
    summary = submissions.c.cv_summary[("summary", order.metric)]
    mean = submissions.c.cv_summary[("summary", order.metric, "mean")].as_float()
    released = holdout_releases.c.released[order.metric].as_float()
    holder = holdout_releases.c.state[("ladder", "best_submission")].as_string()
    # A verdict not yet to be shown (service.gate.timing): the row reads as running, with no release.
    now = utcnow()
    held = submissions.c.published_at.is_not(None) & (submissions.c.published_at > now)
    query = (
        select(
            submissions.c.id, submissions.c.label, case((held, "running"), else_=submissions.c.state).label("state"),
            submissions.c.created_at, submissions.c.owner_key_id,
            case((held, None), else_=submissions.c.verdict["decision"].as_string()).label("decision"),
            submissions.c.policy_version, mean.label("mean"), summary.label("summary"),
            holdout_releases.c.submission_id.label("release_of"), holdout_releases.c.mode,
            released.label("released"), holdout_releases.c.withheld_until, api_keys.c.name.label("key_name"),
            _release_version().label("release_version"), holder.label("holder"),
        )
        .select_from(submissions)
        .outerjoin(holdout_releases, (holdout_releases.c.submission_id == submissions.c.id)
                   & (holdout_releases.c.released_at <= now))
        .outerjoin(api_keys, api_keys.c.id == submissions.c.owner_key_id)
        .where(*_on_board(dataset, mean))
    )
    if after is not None:
        query = query.where(_after(mean, order, after))
    ranked = mean.desc() if order.greater_is_better else mean.asc()
    query = query.order_by(ranked, submissions.c.id.asc()).limit(limit + 1)
    with engine.connect() as conn:
        rows = conn.execute(query).mappings().all()
    start = 0 if after is None else after.position
    entries = [_entry(dict(r), start + i + 1, champion_id, order.metric, policy_version)
               for i, r in enumerate(rows[:limit])]
    if len(rows) <= limit:
        return entries, None
    last = rows[limit - 1]
    return entries, BoardCursor(order, float(last["mean"]), str(last["id"]), start + limit)


def board_document(engine: Engine, dataset: dict[str, Any], limit: int, cursor: str | None) -> dict[str, Any]:
    """Return one page of a dataset's board as ``GET /v1/datasets/{id}/board`` serves it (the desk shows the same).

    ``cursor`` is the ``next_cursor`` of the previous page, or None for the first page.
    """
    policy = policy_in_force(engine, dataset)
    metric = str(policy["primary_metric"])
    order = BoardOrder(metric, bool(policy["greater_is_better"]))
    after = None if cursor is None else decode_cursor(cursor, order)
    champion = champions.current(engine, dataset["id"])
    entries, following = board_page(engine, dataset, order, limit, after, champion, int(policy["version"]))
    released_under = board_policies(engine, dataset, order)
    return {
        "dataset": dataset["id"], "primary_metric": metric, "greater_is_better": order.greater_is_better,
        "policy_version": policy["version"], "champion": champion, "entries": entries,
        "next_cursor": None if following is None else encode_cursor(following),
        "holdout_policies": released_under, "mixed_policies": mixed_policies_note(released_under),
    }


def board_policies(engine: Engine, dataset: dict[str, Any], order: BoardOrder) -> list[dict[str, Any]]:
    """Return every (release mode, policy version) the board's released holdout figures were released under."""
    mean = submissions.c.cv_summary[("summary", order.metric, "mean")].as_float()
    released = holdout_releases.c.released[order.metric].as_float()
    version = _release_version()
    query = (
        select(holdout_releases.c.mode, version.label("version")).distinct()
        .select_from(submissions)
        .join(holdout_releases, holdout_releases.c.submission_id == submissions.c.id)
        .where(*_on_board(dataset, mean), released.is_not(None))
    )
    with engine.connect() as conn:
        rows = conn.execute(query).all()
    return [{"mode": mode, "policy_version": v}
            for mode, v in sorted(rows, key=lambda r: (-1 if r[1] is None else r[1], r[0]))]


def mixed_policies_note(policies: list[dict[str, Any]]) -> str | None:
    """Say, when it is so, that the board's holdout figures were released under different policies."""
    if len(policies) < 2:
        return None
    said = ", ".join(f"{p['mode']} under policy version {p['policy_version']}" for p in policies)
    return (f"The holdout figures on this board were released under different policies ({said}); each row says "
            "which, and figures released under different policies are not comparable.")


def _on_board(dataset: dict[str, Any], mean: ColumnElement[float]) -> list[ColumnElement[bool]]:
    return [submissions.c.team == dataset["team"], submissions.c.dataset_id == dataset["id"],
            submissions.c.state.not_in(("failed", "canceled")), mean.is_not(None)]


def _release_version() -> ColumnElement[Any]:
    """The policy version a release was made under: its own, else (older rows) its submission's verdict's."""
    return func.coalesce(holdout_releases.c.policy_version, submissions.c.policy_version)


def _after(mean: ColumnElement[float], order: BoardOrder, cursor: BoardCursor) -> ColumnElement[bool]:
    beyond = mean < cursor.mean if order.greater_is_better else mean > cursor.mean
    return or_(beyond, and_(mean == cursor.mean, submissions.c.id > cursor.submission_id))


def _entry(row: dict[str, Any], rank: int, champion_id: str | None, metric: str,
           version_in_force: int | None) -> dict[str, Any]:
    summary = row["summary"] if isinstance(row["summary"], dict) else {}
    has_release = row["release_of"] is not None
    shown = None if row["released"] is None else {metric: float(row["released"])}
    ladder = ladder_reading(row["mode"], shown, row["holder"], str(row["id"]))
    return {
        "rank": rank,
        "submission": row["id"],
        "label": row["label"],
        "state": row["state"],
        "cv": {"mean": row["mean"], "std": summary.get("std"), "n": summary.get("n"),
               "naive_interval_95": summary.get("naive_interval_95"), "clipped": summary.get("clipped")},
        "holdout": {
            "released": has_release and row["released"] is not None,
            "mode": row["mode"],
            "score": row["released"],
            "withheld_until": iso(row["withheld_until"]),
            "policy_version": row["release_version"] if has_release else None,
            "figure": _figure_kind(row["mode"]) if shown is not None else None,
            "ladder": ladder,
            "summary": holdout_summary(row["mode"], shown, ladder, f"no holdout {metric} released: withheld, or "
                                       "released under another metric") if has_release else "no holdout figure yet",
        },
        "verdict": row["decision"],
        "policy_version": row["policy_version"],
        "judged_under_policy_in_force": None if row["decision"] is None or version_in_force is None
        else row["policy_version"] == version_in_force,
        "submitter": {"key": row["owner_key_id"], "name": row["key_name"]},
        "created_at": iso(row["created_at"]),
        "champion": row["id"] == champion_id,
    }


def _figure_kind(mode: str | None) -> str:
    """Name what a released figure is: the row's own score, the dataset's best so far, or thresholdout's answer."""
    return dict(zip(RELEASE_MODES, HOLDOUT_FIGURES, strict=True)).get(str(mode), "own_score")
