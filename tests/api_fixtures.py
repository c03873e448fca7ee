"""Fixtures of the HTTP-layer tests: an app on tmp_path with a real SQLite records DB, keys, a client.

Redis is fakeredis here: these tests exercise the HTTP layer only. The configuration check that a
worker answers is replaced by ``worker_says_ok``, which records the documents it was asked about;
the queue path itself, with real Redis and real workers, is covered by the end-to-end tests.
Load with ``pytest_plugins = ["tests.api_fixtures"]``.
"""

from __future__ import annotations

import dataclasses
import io
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import fakeredis
import pytest
from flask import Flask
from flask.testing import FlaskClient
from werkzeug.test import TestResponse

from service.records.keys import create_key
from tests.support.datasets import csv_bytes, diabetes_frame

PROBLEM = "application/problem+json"
WHO = {
    "submitter": ("fleet", "submitter"),
    "submitter2": ("fleet", "submitter"),
    "steward": ("fleet", "steward"),
    "admin": ("fleet", "admin"),
    "other_submitter": ("rivals", "submitter"),
    "other_steward": ("rivals", "steward"),
}


@dataclass
class Api:
    """A test client that speaks as one of the WHO keys."""

    app: Flask
    client: FlaskClient
    tokens: dict[str, str]
    key_ids: dict[str, str]

    def call(self, who: str | None, method: str, path: str, **kwargs: Any) -> TestResponse:
        headers = dict(kwargs.pop("headers", {}) or {})
        if who is not None:
            headers["Authorization"] = f"Bearer {self.tokens.get(who, who)}"
        return self.client.open(path, method=method, headers=headers, **kwargs)

    def get(self, who: str | None, path: str, **kwargs: Any) -> TestResponse:
        return self.call(who, "GET", path, **kwargs)

    def post(self, who: str | None, path: str, **kwargs: Any) -> TestResponse:
        return self.call(who, "POST", path, **kwargs)

    def delete(self, who: str | None, path: str, **kwargs: Any) -> TestResponse:
        return self.call(who, "DELETE", path, **kwargs)

    def upload(self, who: str | None, content: bytes, filename: str = "data.csv", **fields: Any) -> TestResponse:
        data: dict[str, Any] = {k: str(v) for k, v in fields.items() if v is not None}
        data["file"] = (io.BytesIO(content), filename)
        return self.post(who, "/v1/datasets", data=data, content_type="multipart/form-data")

    @staticmethod
    def problem(response: TestResponse, status: int) -> dict[str, Any]:
        """Check the RFC 9457 shape and return the problem document."""
        assert response.status_code == status, response.get_data(as_text=True)
        assert response.mimetype == PROBLEM
        body = response.get_json(force=True)
        assert body["status"] == status
        assert isinstance(body["type"], str) and body["type"]
        assert isinstance(body["title"], str) and body["title"]
        assert isinstance(body["detail"], str) and body["detail"]
        for item in body.get("errors", []):
            assert set(item) == {"pointer", "detail"}
            assert item["pointer"] == "" or item["pointer"].startswith("/")
        return dict(body)

    @staticmethod
    def pointers(problem: dict[str, Any]) -> list[str]:
        return [e["pointer"] for e in problem.get("errors", [])]

    @property
    def engine(self) -> Any:
        return self.app.extensions["sealfold"].engine

    @property
    def settings(self) -> Any:
        return self.app.extensions["sealfold"].settings


@pytest.fixture
def api(tmp_path: Path) -> Iterator[Api]:
    """A fresh app: SQLite records DB and data dir under tmp_path, fakeredis, small upload limit."""
    from service.app import create_app

    import_root = tmp_path / "imports"
    import_root.mkdir()
    app = create_app({
        "data_dir": tmp_path / "data", "import_root": import_root, "database_url": "",
        "redis_url": "redis://127.0.0.1:1/0", "max_upload_bytes": 512 * 1024, "min_rows": 50,
    })
    ctx = app.extensions["sealfold"]
    app.extensions["sealfold"] = dataclasses.replace(ctx, redis=fakeredis.FakeRedis())
    tokens, key_ids = {}, {}
    for who, (team, role) in WHO.items():
        info, token = create_key(ctx.engine, team, role, who)
        tokens[who], key_ids[who] = token, info.id
    yield Api(app, app.test_client(), tokens, key_ids)
    ctx.engine.dispose()


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
        return {"ok": True, "has_proba": False, "linear": True}

    monkeypatch.setattr(dispatch, "check_config_remote", check)
    return asked
