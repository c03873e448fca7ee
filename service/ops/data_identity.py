"""Does this process see the deployment's data? An identity marker in the data dir, matched with the records DB.

Workers read dataset files from ``SEALFOLD_DATA_DIR``, which every API and worker host must mount (the same
volume). A host that lacks the mount sees an empty or different directory; without a check its worker
would fail every fold it takes, and beside a good worker it would quietly lose folds. So a deployment has
one identity: a random id written once into the records DB and into ``<data dir>/deployment-id`` by whoever
first claims it (``sealfold db upgrade``, ``sealfold up`` or the API at start). Workers never write it: they
check it at start and before every job and refuse work when their directory does not carry it; ``/readyz``
reports the same check for the API's own directory.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from sqlalchemy import Engine, insert, select
from sqlalchemy.exc import IntegrityError

from service.records.tables import deployment

MARKER_NAME = "deployment-id"
IDENTITY_KEY = "data_identity"


class DataNotShared(Exception):
    """This process's data dir is not the deployment's (no marker, or another deployment's)."""


def marker_path(data_dir: Path) -> Path:
    """Where the data dir's identity marker lives."""
    return data_dir / MARKER_NAME


def read_marker(data_dir: Path) -> str | None:
    """The identity written in the data dir, or None when it has none (or cannot be read)."""
    try:
        return marker_path(data_dir).read_text(encoding="ascii").strip() or None
    except (OSError, UnicodeDecodeError):
        return None


def recorded_identity(engine: Engine) -> str | None:
    """The identity the records DB holds, or None before the first claim."""
    with engine.connect() as conn:
        value = conn.execute(select(deployment.c.value).where(deployment.c.name == IDENTITY_KEY)).scalar()
    return None if value is None else str(value)


def _write_marker(data_dir: Path, identity: str) -> None:
    data_dir.mkdir(parents=True, exist_ok=True)
    tmp = data_dir / f".{MARKER_NAME}.{os.getpid()}.tmp"
    tmp.write_text(identity + "\n", encoding="ascii")
    os.replace(tmp, marker_path(data_dir))


def claim(engine: Engine, data_dir: Path) -> str:
    """Make sure the DB and ``data_dir`` carry one identity; return it.

    The first claim of a deployment writes a new id (or the marker ``data_dir`` already has) to the DB and
    the marker to ``data_dir``; a deployment made before identities existed is claimed the same way, its
    files kept. Once the DB has an id, a data dir without that marker is the wrong mount and raises
    ``DataNotShared``: nothing is written then.
    """
    recorded = recorded_identity(engine)
    on_disk = read_marker(data_dir)
    if recorded is None:
        candidate = on_disk or secrets.token_hex(16)
        try:
            with engine.begin() as conn:
                conn.execute(insert(deployment).values(name=IDENTITY_KEY, value=candidate))
        except IntegrityError:  # another process claimed first: check against its id
            recorded = recorded_identity(engine)
        else:
            recorded = candidate
            if on_disk is None:
                _write_marker(data_dir, candidate)
                on_disk = candidate
    problem = mismatch(recorded, on_disk, data_dir)
    if problem:
        raise DataNotShared(problem)
    assert recorded is not None
    return recorded


def mismatch(recorded: str | None, on_disk: str | None, data_dir: Path) -> str | None:
    """Words for why ``data_dir`` is not the deployment's, or None when it is."""
    if recorded is None:
        return ("the records database has no data identity yet: run `sealfold db upgrade` with "
                f"SEALFOLD_DATA_DIR={data_dir}")
    if on_disk is None:
        return (f"{data_dir} has no {MARKER_NAME} marker: it is not this deployment's data directory "
                f"(mount the shared data volume there; if `sealfold db upgrade` first ran with another "
                f"SEALFOLD_DATA_DIR, copy its {MARKER_NAME} here)")
    if on_disk != recorded:
        return (f"{data_dir} belongs to another deployment (its {MARKER_NAME} does not match the records "
                f"database): mount this deployment's data volume there")
    return None


def check(engine: Engine, data_dir: Path) -> str | None:
    """Why this process cannot use ``data_dir``, or None when it can."""
    return mismatch(recorded_identity(engine), read_marker(data_dir), data_dir)
