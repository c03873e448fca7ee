"""Who is calling, what their role allows, and which records their team may see.

The team check itself is ``service.team_scope``'s: records of another team answer 404 exactly like
ids that do not exist. These helpers only bring the request's engine and shape the dataset view.
"""

from __future__ import annotations

from typing import Any

from flask import g, request

from service import team_scope
from service.api import service_context
from service.api.problems import InvalidToken
from service.errors import Forbidden, Unauthenticated
from service.records import datasets
from service.records.keys import KeyInfo

_SCHEME = "bearer"


def current_key() -> KeyInfo:
    """Authenticate the request's bearer token once per request."""
    cached: KeyInfo | None = g.get("sealfold_key")
    if cached is not None:
        return cached
    header = request.headers.get("Authorization", "")
    if not header.strip():
        raise Unauthenticated("send an API key as 'Authorization: Bearer <key>'")
    scheme, _, token = header.strip().partition(" ")
    if scheme.lower() != _SCHEME:
        raise Unauthenticated(f"the Authorization header must use the Bearer scheme, got {scheme[:20]!r}")
    token = token.strip()
    ctx = service_context()
    info = ctx.verified_keys.authenticate(ctx.engine, token) if token else None
    if info is None:
        raise InvalidToken("the bearer key is not valid or has been revoked")
    g.sealfold_key = info
    return info


def require(role: str) -> KeyInfo:
    """Return the calling key if its role includes ``role``; 401 without a key, 403 with a weaker one."""
    caller = current_key()
    if not caller.can(role):
        raise Forbidden(f"this needs a {role} key; key {caller.id} is a {caller.role} key")
    return caller


def team_dataset(caller: KeyInfo, ds_id: str) -> dict[str, Any]:
    """Return the record of one of the caller's team's datasets as the caller's role may read it, else 404."""
    return datasets.public_view(team_scope.team_dataset(service_context().engine, caller, ds_id), caller.role)


def team_submission(caller: KeyInfo, sub_id: str) -> dict[str, Any]:
    """Return the row of one of the caller's team's submissions, else 404."""
    return team_scope.team_submission(service_context().engine, caller, sub_id)
