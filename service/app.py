"""Build the API process: ``create_app(overrides)`` is the only way to get a sealfold Flask app.

Settings are layered once (defaults, environment, overrides); the records engine and the Redis
client are built here and handed to the views through ``app.extensions["sealfold"]``. Building the
app checks the records schema's revision (``SchemaOutOfDate`` when it is not this code's) and then
closes that connection, so an app built before a fork (gunicorn ``--preload``) hands no open
connection to the forked workers: each connects on first use, the Redis client on first command.
It also removes the upload spool files a killed request left behind (``service.vault.spool``), claims or
checks the data dir's identity (``service.ops.data_identity``: an API on the wrong mount refuses to start)
and sets up logging (JSON lines, or text with ``SEALFOLD_LOG_FORMAT=text``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from flask import Flask
from redis import Redis

from service import __version__
from service.api import EXTENSION_KEY, SealfoldApi, ServiceContext, register_blueprints
from service.api.internal import register_internal
from service.api.telemetry import HttpMetrics, install
from service.logs import configure_logging
from service.ops import data_identity
from service.records.engine import make_engine
from service.records.schema import require_current
from service.settings import Settings
from service.submission.recent_documents import RecentDocuments
from service.vault.spool import sweep_spool
from service.verified_keys import VerifiedKeys
from service.web import register_desk

REDIS_CONNECT_TIMEOUT_SECONDS = 5.0


def create_app(overrides: Mapping[str, Any] | None = None) -> Flask:
    """Return a configured app; ``overrides`` are Settings fields (tests pass data_dir, redis_url...)."""
    settings = Settings.load(overrides)
    configure_logging(settings.log_level, settings.log_format)
    engine = make_engine(settings)
    try:
        require_current(engine)
        data_identity.claim(engine, settings.data_dir)
    finally:
        engine.dispose()  # the pool is empty again: nothing open crosses a fork
    sweep_spool(settings)
    app = Flask("service")
    app.config.update(
        MAX_CONTENT_LENGTH=settings.max_upload_bytes,
        API_TITLE="sealfold",
        API_VERSION=__version__,
        OPENAPI_VERSION="3.0.3",
        OPENAPI_URL_PREFIX="/",
        OPENAPI_JSON_PATH="openapi.json",
        API_SPEC_OPTIONS=spec_options(),
    )
    app.extensions[EXTENSION_KEY] = ServiceContext(
        settings=settings,
        engine=engine,
        redis=Redis.from_url(settings.redis_url, socket_connect_timeout=REDIS_CONNECT_TIMEOUT_SECONDS),
        http_metrics=HttpMetrics(),
        verified_keys=VerifiedKeys(settings.key_cache_seconds),
        recent_documents=RecentDocuments(),
    )
    api = SealfoldApi(app)
    register_blueprints(api)
    register_internal(app)
    register_desk(app)
    install(app, app.extensions[EXTENSION_KEY].http_metrics)
    return app


def spec_options() -> dict[str, Any]:
    """OpenAPI extras: the bearer scheme, required everywhere unless an operation says otherwise."""
    return {
        "info": {"description": "Review ML model submissions against a sealed holdout."},
        "components": {"securitySchemes": {"bearer": {
            "type": "http", "scheme": "bearer",
            "description": "an API key: Authorization: Bearer <key>",
        }}},
        "security": [{"bearer": []}],
    }
