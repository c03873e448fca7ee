"""Fixtures of the service tests: an app on tmp_path with a real SQLite records DB and keys, or that DB alone.

The app gets fakeredis: its tests exercise the HTTP layer only. The configuration check that a
worker answers is replaced by ``worker_says_ok``; the queue path itself, with real Redis and real
workers, is covered by the end-to-end tests.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine

from tests.support.api import Api, open_api
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.records import records_engine


@pytest.fixture
def api(tmp_path: Path) -> Iterator[Api]:
    """A fresh app: SQLite records DB and data dir under tmp_path, fakeredis, small upload limit."""
    with open_api(tmp_path) as client:
        yield client


@pytest.fixture
def records(tmp_path: Path) -> Iterator[Engine]:
    """A records DB of its own (SQLite under tmp_path), for core tests that need no app."""
    engine = records_engine(tmp_path / "records")
    yield engine
    engine.dispose()


@pytest.fixture
def diabetes_csv() -> bytes:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn) as a CSV upload: 442 rows."""
    return csv_bytes(diabetes_frame())


@pytest.fixture
def dataset(api: Api, diabetes_csv: bytes) -> dict[str, Any]:
    """The diabetes data registered by the fleet steward (regression on 'target', 5 folds)."""
    reply = api.upload("steward", diabetes_csv, name="diabetes", target="target", task="regression")
    assert reply.status_code == 201, reply.get_data(as_text=True)
    return dict(reply.get_json())


@pytest.fixture
def worker_says_ok(monkeypatch: pytest.MonkeyPatch) -> list[dict[str, Any]]:
    """Answer the worker's configuration check with "ok" and keep the documents it was sent."""
    from service.submission import dispatch

    asked: list[dict[str, Any]] = []

    def check(redis: Any, settings: Any, config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
        asked.append(config_doc)
        return {"ok": True, "has_proba": False}

    monkeypatch.setattr(dispatch, "check_config_remote", check)
    return asked
