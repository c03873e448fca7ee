"""The HTTP-layer tests' client (it speaks as one of the WHO keys), and a submission body to send."""

from __future__ import annotations

import dataclasses
import io
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import fakeredis
from flask import Flask
from flask.testing import FlaskClient
from sqlalchemy import func, select
from werkzeug.test import TestResponse

from service.records.keys import create_key
from service.records.tables import submissions as submissions_table

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


@contextmanager
def open_api(root: Path) -> Iterator[Api]:
    """A fresh app: upgraded SQLite records and data dir under ``root``, fakeredis, small upload limit, WHO's keys."""
    from service.app import create_app
    from service.settings import Settings
    from tests.support.records import upgraded_engine

    import_root = root / "imports"
    import_root.mkdir()
    overrides = {
        "data_dir": root / "data", "import_root": import_root, "database_url": "",
        "redis_url": "redis://127.0.0.1:1/0", "max_upload_bytes": 512 * 1024, "min_rows": 50,
    }
    upgraded_engine(Settings.load(overrides)).dispose()
    app = create_app(overrides)
    ctx = app.extensions["sealfold"]
    app.extensions["sealfold"] = dataclasses.replace(ctx, redis=fakeredis.FakeRedis())
    tokens, key_ids = {}, {}
    for who, (team, role) in WHO.items():
        info, token = create_key(ctx.engine, team, role, who)
        tokens[who], key_ids[who] = token, info.id
    try:
        yield Api(app, app.test_client(), tokens, key_ids)
    finally:
        ctx.engine.dispose()


def submission_body(ds: dict[str, Any], **changes: Any) -> dict[str, Any]:
    """Scaled Ridge on four diabetes columns, with ``changes`` replacing top-level fields."""
    body: dict[str, Any] = {
        "dataset": ds["id"],
        "model": {"estimator": "Ridge", "params": {"alpha": 1.0}, "features": ["age", "bmi", "bp", "s5"],
                  "preprocess": [{"transformer": "StandardScaler", "columns": ["age", "bmi", "bp", "s5"]}]},
        "metrics": ["rmse", "r2"],
        "label": "ridge on four columns",
    }
    body.update(changes)
    return body


def count_submissions(api: Api) -> int:
    with api.engine.connect() as conn:
        return int(conn.execute(select(func.count()).select_from(submissions_table)).scalar_one())
