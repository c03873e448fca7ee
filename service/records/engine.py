"""Open the records DB: one engine per process, built from settings."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import Engine, create_engine, event

from service.settings import Settings


def make_engine(settings: Settings) -> Engine:
    """Build the engine for ``settings``; SQLite gets WAL and a busy timeout for concurrent workers.

    It opens no connection and changes no schema: ``service.records.schema`` upgrades and checks the
    revision. Build it in the process that uses it (after any fork), never at import time.
    """
    url = settings.effective_database_url
    if url.startswith("sqlite"):
        settings.data_dir.mkdir(parents=True, exist_ok=True)
        engine = create_engine(url, connect_args={"timeout": 30})
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    return create_engine(url, pool_pre_ping=True)


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
