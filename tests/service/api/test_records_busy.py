"""A records DB that is busy (locked by another connection) answers a 503 naming the database, quickly."""

from __future__ import annotations

import dataclasses
import sqlite3
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import fakeredis
import psycopg
import pytest
from flask import Flask
from sqlalchemy import create_engine

from service.app import create_app
from service.records.keys import create_key
from service.settings import Settings
from tests.support.records import upgraded_engine
from tests.support.servers import postgres_database, register_worker

if TYPE_CHECKING:
    from tests.support.api import Api

BUSY = "the records database is busy"


@pytest.fixture
def pg_app(tmp_path: Path) -> Iterator[tuple[Flask, str, str]]:
    """An app on a throwaway PostgreSQL database with short timeouts; yields it, its URL and a steward's token."""
    with postgres_database() as url:
        overrides = {"data_dir": tmp_path, "database_url": url, "redis_url": "redis://127.0.0.1:1/0",
                     "db_lock_timeout_seconds": 0.25, "db_statement_timeout_seconds": 2}
        upgraded_engine(Settings.load(overrides, environ={})).dispose()  # what `sealfold db upgrade` does
        app = create_app(overrides)
        ctx = app.extensions["sealfold"]
        app.extensions["sealfold"] = dataclasses.replace(ctx, redis=fakeredis.FakeRedis())
        register_worker(app.extensions["sealfold"].redis, ctx.settings.queue_name)  # /readyz needs a live one
        _info, token = create_key(ctx.engine, "fleet", "steward", "busy test")
        try:
            yield app, url.replace("postgresql+psycopg://", "postgresql://", 1), token
        finally:
            ctx.engine.dispose()


@pytest.mark.postgres
@pytest.mark.timeout(60)
@pytest.mark.parametrize("table", ["datasets", "api_keys"])
def test_a_locked_table_makes_a_get_a_503_naming_the_database(pg_app: tuple[Flask, str, str], table: str) -> None:
    app, url, token = pg_app
    client = app.test_client()
    bearer = {"Authorization": f"Bearer {token}"}
    assert client.get("/v1/datasets", headers=bearer).status_code == 200
    # A key the app has not verified yet, so the request reads api_keys: one it verified is remembered for
    # key_cache_seconds (service/verified_keys.py) and would not touch that table.
    _info, fresh = create_key(app.extensions["sealfold"].engine, "fleet", "steward", "fresh")
    with psycopg.connect(url) as holder:  # a transaction holding the lock until the block ends
        holder.execute(f"LOCK TABLE {table} IN ACCESS EXCLUSIVE MODE")
        reply = client.get("/v1/datasets", headers={"Authorization": f"Bearer {fresh}"})
        assert reply.status_code == 503 and reply.mimetype == "application/problem+json"
        problem = reply.get_json()
        assert problem["detail"].startswith(BUSY) and "LOCK" not in reply.get_data(as_text=True)
        # The health checks touch no table and keep answering.
        assert client.get("/healthz").status_code == 200
        assert client.get("/readyz").status_code == 200
    assert client.get("/v1/datasets", headers=bearer).status_code == 200


def test_a_locked_sqlite_database_is_the_databases_503(api: Api) -> None:
    # The app's engine waits 30 s for SQLite's lock; one that does not wait shows the same error at once.
    url = api.engine.url
    impatient = create_engine(url, connect_args={"timeout": 0})
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, engine=impatient)
    holder = sqlite3.connect(url.database or "", isolation_level=None)
    try:
        holder.execute("BEGIN EXCLUSIVE")
        reply = api.post("admin", "/v1/keys", json={"role": "submitter", "name": "while locked"})
        problem = api.problem(reply, 503)
        assert problem["detail"].startswith(BUSY)
        assert "job queue" not in problem["detail"]
    finally:
        holder.close()
        impatient.dispose()
    api.app.extensions["sealfold"] = ctx
    assert api.post("admin", "/v1/keys", json={"role": "submitter"}).status_code == 201
