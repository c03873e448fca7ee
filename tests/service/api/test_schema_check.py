"""The API process refuses a records database that is not at this code's revision, and keeps no connection open."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from service.app import create_app
from service.records import schema
from service.records.engine import make_engine
from service.settings import Settings
from tests.support.records import upgraded_engine


def _overrides(tmp_path: Path) -> dict[str, Any]:
    return {"data_dir": tmp_path, "database_url": "", "redis_url": "redis://127.0.0.1:1/0"}


def test_the_app_refuses_a_database_that_is_behind(tmp_path: Path) -> None:
    engine = make_engine(Settings.load(_overrides(tmp_path)))
    schema.upgrade(engine, "0004")
    engine.dispose()
    with pytest.raises(schema.SchemaOutOfDate) as refused:
        create_app(_overrides(tmp_path))
    assert str(refused.value) == (f"the records database is at revision 0004, this code needs "
                                  f"{schema.head_revision()}: run `sealfold db upgrade`")


def test_the_app_refuses_an_empty_database_rather_than_creating_tables(tmp_path: Path) -> None:
    with pytest.raises(schema.SchemaOutOfDate, match="at revision none"):
        create_app(_overrides(tmp_path))
    engine = make_engine(Settings.load(_overrides(tmp_path)))
    try:
        assert schema.current_revision(engine) is None
    finally:
        engine.dispose()


def test_an_app_built_before_a_fork_holds_no_open_connection(tmp_path: Path) -> None:
    # gunicorn --preload builds the app in the master and forks: a pooled connection would be shared.
    upgraded_engine(Settings.load(_overrides(tmp_path))).dispose()
    app = create_app(_overrides(tmp_path))
    engine = app.extensions["sealfold"].engine
    try:
        assert engine.pool.checkedin() == 0 and engine.pool.checkedout() == 0
        assert app.test_client().get("/healthz").status_code == 200
    finally:
        engine.dispose()
