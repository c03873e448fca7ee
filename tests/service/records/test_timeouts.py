"""The records DB on PostgreSQL: every connection carries the statement and lock timeouts of the settings."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import Engine, text
from sqlalchemy.exc import OperationalError

from service.errors import SettingsError
from service.records.engine import is_busy, make_engine
from service.settings import Settings
from tests.support.servers import postgres_database


@pytest.fixture
def pg_engine(tmp_path: Path) -> Iterator[Engine]:
    with postgres_database() as url:
        settings = Settings.load({"data_dir": tmp_path, "database_url": url, "db_statement_timeout_seconds": 0.5,
                                  "db_lock_timeout_seconds": 0.25}, environ={})
        engine = make_engine(settings)
        yield engine
        engine.dispose()


@pytest.mark.postgres
def test_each_connection_has_the_configured_timeouts(pg_engine: Engine) -> None:
    # PostgreSQL reports these settings in its own units (runtime-config-client, "statement_timeout").
    with pg_engine.connect() as conn:
        assert conn.execute(text("SHOW statement_timeout")).scalar_one() == "500ms"
        assert conn.execute(text("SHOW lock_timeout")).scalar_one() == "250ms"


@pytest.mark.postgres
def test_a_statement_past_its_timeout_fails_as_busy_and_the_pool_recovers(pg_engine: Engine) -> None:
    with pytest.raises(OperationalError) as raised, pg_engine.connect() as conn:
        conn.execute(text("SELECT pg_sleep(5)"))
    assert is_busy(raised.value)  # SQLSTATE 57014 query_canceled (PostgreSQL, appendix A)
    with pg_engine.connect() as conn:
        assert conn.execute(text("SELECT 1")).scalar_one() == 1


def test_timeouts_are_settings_from_the_environment() -> None:
    loaded = Settings.load(environ={"SEALFOLD_DB_STATEMENT_TIMEOUT": "7.5", "SEALFOLD_DB_LOCK_TIMEOUT": "0"})
    assert (loaded.db_statement_timeout_seconds, loaded.db_lock_timeout_seconds) == (7.5, 0.0)
    assert (Settings().db_statement_timeout_seconds, Settings().db_lock_timeout_seconds) == (5.0, 2.0)
    with pytest.raises(SettingsError, match="db_lock_timeout_seconds"):
        Settings(db_lock_timeout_seconds=-1)
