"""The one exception tree of sealfold.

Every error the service raises on purpose is a ``SealfoldError`` with a stable ``code`` and an HTTP
``status``; the API renders them as RFC 9457 problem+json in one handler (``service.api.problems``).
Foreign errors (marshmallow, SQL, RQ, Redis) are translated where they cross into the core.

    SealfoldError
    +-- SettingsError            500  bad deployment configuration
    +-- InputError               422  request content is wrong; carries field problems
    |   +-- DatasetRejected      422  an uploaded dataset fails validation
    |   +-- ConfigRejected       422  a model configuration is not allowed
    +-- UnsupportedFormat        415
    +-- PayloadTooLarge          413
    +-- Unauthenticated          401
    +-- Forbidden                403
    +-- NotFound                 404
    +-- Conflict                 409  (fingerprint mismatch, state does not allow the action)
    +-- Unavailable              503  queue, worker or records DB not reachable, or the records DB busy
    +-- SealBroken               500  a sealed file no longer matches its fingerprint
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class FieldProblem:
    """One problem with one field, located by a JSON pointer (RFC 6901) into the request."""

    pointer: str
    detail: str


class SealfoldError(Exception):
    """Base of every deliberate sealfold error."""

    code: str = "internal"
    status: int = 500
    title: str = "Internal error"

    def __init__(self, detail: str, problems: list[FieldProblem] | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.problems: list[FieldProblem] = list(problems or [])


class SettingsError(SealfoldError):
    code, status, title = "settings", 500, "Bad service settings"


class InputError(SealfoldError):
    code, status, title = "invalid-input", 422, "Invalid input"


class DatasetRejected(InputError):
    code, title = "dataset-rejected", "Dataset rejected"


class ConfigRejected(InputError):
    code, title = "config-rejected", "Model configuration rejected"


class UnsupportedFormat(SealfoldError):
    code, status, title = "unsupported-format", 415, "Unsupported format"


class PayloadTooLarge(SealfoldError):
    code, status, title = "payload-too-large", 413, "Payload too large"


class Unauthenticated(SealfoldError):
    code, status, title = "unauthenticated", 401, "Authentication required"


class Forbidden(SealfoldError):
    code, status, title = "forbidden", 403, "Forbidden"


class NotFound(SealfoldError):
    code, status, title = "not-found", 404, "Not found"


class Conflict(SealfoldError):
    code, status, title = "conflict", 409, "Conflict"


class TeamLimitReached(SealfoldError):
    code, status, title = "team-limit", 429, "Team limit reached"


class Unavailable(SealfoldError):
    code, status, title = "unavailable", 503, "Service unavailable"


class SealBroken(SealfoldError):
    code, status, title = "seal-broken", 500, "Sealed partition failed its check"


def field_error(cls: type[SealfoldError], pointer: str, detail: str) -> SealfoldError:
    """Build an error about a single field, with the same text as detail and as the field problem."""
    return cls(detail, [FieldProblem(pointer, detail)])
