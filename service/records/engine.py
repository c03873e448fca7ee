"""Open the records DB: one engine per process, built from settings."""

from __future__ import annotations

import contextlib
import os
import sqlite3
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event, make_url
from sqlalchemy.exc import DBAPIError

from service.settings import Settings

# PostgreSQL's lock_not_available (lock_timeout) and query_canceled (statement_timeout) SQLSTATEs.
_BUSY_SQLSTATES = frozenset({"55P03", "57014"})


def make_engine(settings: Settings) -> Engine:
    """Build the engine for ``settings``; SQLite gets WAL and a busy timeout for concurrent workers.

    PostgreSQL connections get the statement and lock timeouts of the settings, so a lock held
    elsewhere makes a request fail in seconds instead of queueing every request behind it. It opens
    no connection and changes no schema: ``service.records.schema`` upgrades and checks the revision.
    Build it in the process that uses it (after any fork), never at import time.
    """
    url = settings.effective_database_url
    if url.startswith("sqlite"):
        settings.data_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
        _create_owner_only(url)
        engine = create_engine(url, connect_args={"timeout": 30})
        event.listen(engine, "connect", _sqlite_pragmas)
    else:
        engine = create_engine(url, pool_pre_ping=True)
        if engine.dialect.name == "postgresql":
            event.listen(engine, "connect", _postgres_timeouts(settings))
    return engine


def _create_owner_only(url: str) -> None:
    """Create a new SQLite records file readable by its owner only (0600), before SQLite opens it.

    The records hold raw holdout scores and the release mechanisms' noise. SQLite gives the ``-wal``
    and ``-shm`` files it makes beside the database the database file's own mode, so they are 0600
    too. An existing file is left as it is; so is an in-memory database.
    """
    database = make_url(url).database
    if not database or database == ":memory:" or database.startswith("file:"):
        return
    path = Path(database)
    path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
    with contextlib.suppress(FileExistsError):
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))


def is_busy(error: DBAPIError) -> bool:
    """Tell a records DB that is busy (a lock or statement timed out) from one that is not reachable."""
    orig = error.orig
    if getattr(orig, "sqlstate", None) in _BUSY_SQLSTATES:
        return True
    # SQLite: "database is locked", "database table is locked", "database schema is locked".
    return isinstance(orig, sqlite3.OperationalError) and "locked" in str(orig)


def _postgres_timeouts(settings: Settings) -> Any:
    statement_ms = round(settings.db_statement_timeout_seconds * 1000)
    lock_ms = round(settings.db_lock_timeout_seconds * 1000)

    def set_timeouts(dbapi_connection: Any, _record: Any) -> None:
        cursor = dbapi_connection.cursor()
        cursor.execute(f"SET statement_timeout = {statement_ms:d}")
        cursor.execute(f"SET lock_timeout = {lock_ms:d}")
        cursor.close()
        dbapi_connection.commit()  # session settings, kept past the transaction the SETs opened

    return set_timeouts


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


def utcnow() -> datetime:
    """Timezone-aware now; every timestamp in the records is UTC."""
    return datetime.now(UTC)


def as_utc(value: datetime | None) -> datetime | None:
    """SQLite returns naive datetimes; treat them as the UTC they were written as."""
    if value is None:
        return None
    return value if value.tzinfo else value.replace(tzinfo=UTC)


def iso(value: datetime | None) -> str | None:
    """Render a timestamp for a response, with an explicit Z offset."""
    stamped = as_utc(value)
    return None if stamped is None else stamped.isoformat().replace("+00:00", "Z")
