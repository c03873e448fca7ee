"""The HTTP layer: flask-smorest blueprints over the service core.

Only this package and ``service.app`` import Flask. Views parse a request once at the edge (schemas),
call the core, and answer with the core's documents; every error leaves through ``problems``.
The per-app state -- settings, records engine, Redis client, HTTP metrics -- is one frozen
``ServiceContext`` on ``app.extensions["sealfold"]``, built by ``create_app``; nothing is global.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

from flask import Flask, Response, current_app
from redis import Redis
from sqlalchemy import Engine

from service.api.blueprint import SealfoldApi, SealfoldBlueprint
from service.settings import Settings

if TYPE_CHECKING:
    from service.api.telemetry import HttpMetrics
    from service.submission.recent_documents import RecentDocuments
    from service.verified_keys import VerifiedKeys

__all__ = ["EXTENSION_KEY", "SealfoldApi", "SealfoldBlueprint", "ServiceContext", "json_response",
           "register_blueprints", "service_context"]

EXTENSION_KEY = "sealfold"


@dataclass(frozen=True)
class ServiceContext:
    """What every view needs, built once per app by ``create_app``."""

    settings: Settings
    engine: Engine
    redis: Redis[bytes]
    http_metrics: HttpMetrics
    verified_keys: VerifiedKeys
    recent_documents: RecentDocuments


def service_context(app: Flask | None = None) -> ServiceContext:
    """Return the context of ``app`` (default: the app handling the current request)."""
    target = current_app if app is None else app
    return cast(ServiceContext, target.extensions[EXTENSION_KEY])


def json_response(document: Any, status: int = 200, headers: Mapping[str, str] | None = None) -> Response:
    """Answer with a core document as-is (the schemas document it; they never filter it)."""
    response = current_app.response_class(
        current_app.json.dumps(document) + "\n", status=status, mimetype="application/json"
    )
    for name, value in (headers or {}).items():
        response.headers[name] = value
    return response


def register_blueprints(api: SealfoldApi) -> None:
    """Register every blueprint of the v1 surface and the open operational endpoints."""
    from service.api import catalog, datasets, keys, ops, report, reviews, submissions, verdicts

    for module in (datasets, reviews, submissions, verdicts, report, catalog, keys, ops):
        api.register_blueprint(module.blp)
