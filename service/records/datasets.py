"""Dataset records. The public view never carries the sealing seed or the holdout's fingerprint.

The balance of the seal is shown by role: every team member reads the summary (balanced or not,
the adversarial AUC, how many draws it took); stewards and admins also read the per-column table
and each draw's summary. The table holds holdout aggregates (means, distributions) that a
submitter could use to tune towards the holdout, so it stays with the people who hold the seal.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Connection, Engine, select

from service.errors import Conflict, field_error
from service.records import audit
from service.records.engine import iso
from service.records.tables import datasets
from service.vocabulary import ROLES

_PRIVATE = ("sealing_seed", "holdout_fingerprint")
BALANCE_SUMMARY = ("balanced", "adversarial_auc", "draws")
_READS_BALANCE_TABLE = "steward"


def refuse_taken_name(engine: Engine | Connection, team: str, name: str) -> None:
    """Raise a 409 on /name when the team already has a dataset of this name.

    Names are unique within a team, so a board, a CLI listing or a report names one dataset. Checked before
    the file is read and again in the transaction that inserts the row.
    """
    query = select(datasets.c.id).where(datasets.c.team == team, datasets.c.name == name).limit(1)
    if isinstance(engine, Connection):
        taken = engine.execute(query).scalar()
    else:
        with engine.connect() as conn:
            taken = conn.execute(query).scalar()
    if taken is not None:
        raise field_error(Conflict, "/name", f"team {team!r} already has a dataset named {name!r} ({taken}); "
                          "dataset names are unique within a team: choose another name")


def insert(engine: Engine, row: dict[str, Any]) -> None:
    """Insert a dataset row and its audit event in one transaction; a name the team already has is a 409."""
    with engine.begin() as conn:
        refuse_taken_name(conn, row["team"], row["name"])
        conn.execute(datasets.insert().values(**row))
        audit.record(
            conn, row["created_by"], row["team"], "dataset.registered", row["id"],
            {"fingerprint": row["fingerprint"], "rows_total": row["rows_total"]},
        )


def get_internal(engine: Engine, ds_id: str) -> dict[str, Any] | None:
    """Return the whole row, secrets included: for the core and the workers, never for a response."""
    with engine.connect() as conn:
        row = conn.execute(select(datasets).where(datasets.c.id == ds_id)).mappings().first()
    return None if row is None else dict(row)


def public_view(row: dict[str, Any], role: str = "submitter") -> dict[str, Any]:
    """Shape an internal row into the document a team member with ``role`` may read."""
    view = {k: v for k, v in row.items() if k not in _PRIVATE}
    view["balance"] = balance_view(row.get("balance"), role)
    view["created_at"] = iso(row["created_at"])
    view["rows"] = {
        "total": row["rows_total"], "development": row["rows_development"], "holdout": row["rows_holdout"],
    }
    view["holdout"] = {"scheme": row["holdout_scheme"], "fraction": row["holdout_fraction"]}
    for k in ("rows_total", "rows_development", "rows_holdout", "holdout_scheme", "holdout_fraction"):
        view.pop(k)
    return view


def balance_view(document: dict[str, Any] | None, role: str) -> dict[str, Any] | None:
    """Return the whole balance document to stewards and admins, its summary keys to submitters."""
    if document is None:
        return None
    if ROLES.index(role) >= ROLES.index(_READS_BALANCE_TABLE):
        return dict(document)
    return {k: document.get(k) for k in BALANCE_SUMMARY}


def get(engine: Engine, ds_id: str, role: str = "submitter") -> dict[str, Any] | None:
    """Return the view of one dataset for a caller with ``role``, or None."""
    row = get_internal(engine, ds_id)
    return None if row is None else public_view(row, role)


def list_for_team(engine: Engine, team: str, role: str = "submitter") -> list[dict[str, Any]]:
    """Return the views of a team's datasets for a caller with ``role``, newest first."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(datasets).where(datasets.c.team == team).order_by(datasets.c.created_at.desc())
        ).mappings().all()
    return [public_view(dict(r), role) for r in rows]


def find_by_name(engine: Engine, team: str, name: str) -> dict[str, Any] | None:
    """Return the newest dataset of a team with this name (the demo reuses its dataset this way)."""
    with engine.connect() as conn:
        row = conn.execute(
            select(datasets).where(datasets.c.team == team, datasets.c.name == name)
            .order_by(datasets.c.created_at.desc())
        ).mappings().first()
    return None if row is None else public_view(dict(row))
