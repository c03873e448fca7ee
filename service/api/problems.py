"""Render every error as an RFC 9457 problem document (``application/problem+json``).

One boundary for foreign errors: sealfold's own ``SealfoldError`` tree, werkzeug's HTTP exceptions
(including flask-smorest's 422 from webargs and the 413 of an oversized body), marshmallow's
validation errors, and the records DB or Redis going away all leave through ``problem_response``.
Server-side failures are logged and answered with a fixed text, so no internal detail (paths,
SQL, stack frames, anything about sealed data) ever reaches a client.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Iterator, Mapping
from typing import Any

from flask import Flask, Response, current_app, json, request
from marshmallow import ValidationError
from redis.exceptions import RedisError
from sqlalchemy.exc import OperationalError
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from service.errors import FieldProblem, PayloadTooLarge, SealfoldError, Unauthenticated, Unavailable
from service.records.engine import is_busy

log = logging.getLogger(__name__)

PROBLEM_MIMETYPE = "application/problem+json"
TYPE_PREFIX = "urn:sealfold:problem:"
BEARER_CHALLENGE = 'Bearer realm="sealfold"'
_INTERNAL_DETAIL = "the service hit an internal error; the operators can find it in the service log"
_SUMMARY_PROBLEMS = 3
ECHO_LIMIT = 100  # characters of one echoed value that a problem shows
TEXT_LIMIT = 2000  # characters of one detail or pointer, whatever it holds (give or take the last value)
# One token of a problem text: a quoted string (a repr; a quote after a letter is an apostrophe, not
# an opening) or else a run of non-space characters. Possessive loops keep a long one linear.
_TOKEN = re.compile(r"""(?<!\w)'[^'\\]*+(?:\\.[^'\\]*+)*+'|(?<!\w)"[^"\\]*+(?:\\.[^"\\]*+)*+"|\S+""")


class InvalidToken(Unauthenticated):
    """A bearer token was sent but matches no live key (RFC 6750 ``invalid_token``)."""


def problem_type(code: str) -> str:
    """Return the ``type`` URI of a sealfold problem code."""
    return TYPE_PREFIX + code


def problem_response(
    status: int,
    title: str,
    detail: str,
    type_uri: str = "about:blank",
    problems: list[FieldProblem] | None = None,
    headers: Mapping[str, str] | None = None,
) -> Response:
    """Build the problem+json response; ``errors`` is present only when there are field problems.

    Every text goes through ``cap_echoes``: details quote the values they reject, and a value of
    megabytes must not come back as a problem of megabytes.
    """
    body: dict[str, Any] = {"type": type_uri, "title": title, "status": status, "detail": cap_echoes(detail)}
    if problems:
        body["errors"] = [{"pointer": cap_echoes(p.pointer), "detail": cap_echoes(p.detail)} for p in problems]
    response = current_app.response_class(
        json.dumps(body), status=status, mimetype=PROBLEM_MIMETYPE
    )
    for name, value in (headers or {}).items():
        if name.lower() not in ("content-type", "content-length"):
            response.headers[name] = value
    return response


def cap_echoes(text: str) -> str:
    """Shorten each echoed value in a problem text to ECHO_LIMIT characters, and the text to TEXT_LIMIT.

    An echoed value is a quoted string (a ``repr``) or an unbroken run of non-space characters; a
    shortened one ends with an ellipsis and says how long it was. The whole text is cut too, for a
    value that is neither (a long list of short strings). Reading stops at the cut, so a text of
    megabytes costs only the length of the values that start before it.
    """
    if len(text) <= ECHO_LIMIT:
        return text
    pieces: list[str] = []
    size = pos = 0
    while size < TEXT_LIMIT:
        token = _TOKEN.search(text, pos)
        if token is None:
            pieces.append(_shorten(text[pos:]))
            break
        shown = [_shorten(text[pos:token.start()]), _shorten(token.group(0))]
        pieces += shown
        size += sum(map(len, shown))
        pos = token.end()
    else:
        if pos < len(text):
            pieces.append(f"… ({len(text)} characters)")
    return "".join(pieces)


def _shorten(value: str) -> str:
    """The first ECHO_LIMIT characters of a value, an ellipsis, its closing quote if any, and its length."""
    if len(value) <= ECHO_LIMIT:
        return value
    quote = value[0] if value[0] in "'\"" and value[-1] == value[0] else ""
    return f"{value[:ECHO_LIMIT]}…{quote} ({len(value) - 2 * len(quote)} characters)"


def render_sealfold_error(error: SealfoldError) -> Response:
    """Render a deliberate sealfold error; 5xx other than 503 get a fixed detail and a log line."""
    headers: dict[str, str] = {}
    if isinstance(error, Unauthenticated):
        challenge = BEARER_CHALLENGE
        if isinstance(error, InvalidToken):
            challenge += ', error="invalid_token"'
        headers["WWW-Authenticate"] = challenge
    detail = error.detail
    problems = error.problems
    if error.status >= 500 and not isinstance(error, Unavailable):
        log.error("%s on %s %s: %s", type(error).__name__, request.method, request.path, error.detail)
        detail, problems = _INTERNAL_DETAIL, []
    return problem_response(
        error.status, error.title, detail, problem_type(error.code), problems, headers
    )


def render_http_exception(error: HTTPException) -> Response:
    """Render werkzeug's exceptions, including flask-smorest's 422 carrying webargs messages."""
    status = error.code or 500
    if isinstance(error, RequestEntityTooLarge):
        return render_sealfold_error(PayloadTooLarge(_too_large_detail()))
    data = getattr(error, "data", None) or {}
    messages = data.get("messages")
    headers = dict(error.get_headers())
    headers.update(data.get("headers") or {})
    if status == 422 and messages is not None:
        problems = list(flatten_messages(_without_location(messages)))
        return problem_response(
            422, "Invalid input", summarize(problems), problem_type("invalid-input"), problems, headers
        )
    if status == 400 and messages is not None:
        return problem_response(
            400, "Bad request", "the request body is not valid JSON", problem_type("bad-request"),
            headers=headers,
        )
    if status >= 500:
        original = getattr(error, "original_exception", None)
        if original is not None:  # Flask already logged the traceback of an unhandled exception
            return problem_response(500, "Internal error", _INTERNAL_DETAIL, problem_type("internal"))
        return problem_response(status, error.name, _INTERNAL_DETAIL, headers=headers)
    return problem_response(status, error.name, error.description or error.name, headers=headers)


def render_validation_error(error: ValidationError) -> Response:
    """Render a marshmallow error raised while loading a body by hand (multipart forms)."""
    problems = list(flatten_messages(error.messages))
    return problem_response(
        422, "Invalid input", summarize(problems), problem_type("invalid-input"), problems
    )


def render_database_down(error: OperationalError) -> Response:
    """The records DB is unreachable, or busy (locked beyond its timeout): a 503, not a leaked SQL error."""
    log.error("records DB error on %s %s: %s", request.method, request.path, error.orig)
    if is_busy(error):
        return render_sealfold_error(Unavailable("the records database is busy; try again shortly"))
    return render_sealfold_error(Unavailable("the records database is not reachable; try again shortly"))


def render_queue_down(error: RedisError) -> Response:
    """Redis is unreachable: a 503 naming the component, never its address."""
    log.error("Redis error on %s %s: %s", request.method, request.path, error)
    return render_sealfold_error(Unavailable("the job queue is not reachable; try again shortly"))


def install(app: Flask) -> None:
    """Register the handlers; the HTTPException one replaces flask-smorest's JSON error handler."""
    app.register_error_handler(SealfoldError, render_sealfold_error)
    app.register_error_handler(HTTPException, render_http_exception)
    app.register_error_handler(ValidationError, render_validation_error)
    app.register_error_handler(OperationalError, render_database_down)
    app.register_error_handler(RedisError, render_queue_down)


def flatten_messages(messages: Any, pointer: str = "") -> Iterator[FieldProblem]:
    """Turn marshmallow's nested messages into JSON pointers: {"model": {"params": ...}} -> /model/params.

    ``_schema`` keys (whole-object problems) point at their parent; list indices become segments.
    """
    if isinstance(messages, Mapping):
        for key, value in messages.items():
            child = pointer if key == "_schema" else f"{pointer}/{escape_pointer(str(key))}"
            yield from flatten_messages(value, child)
    elif isinstance(messages, list | tuple):
        for item in messages:
            yield from flatten_messages(item, pointer)
    else:
        yield FieldProblem(pointer, str(messages))


def escape_pointer(segment: str) -> str:
    """Escape one JSON pointer segment (RFC 6901: ``~`` -> ``~0``, ``/`` -> ``~1``)."""
    return segment.replace("~", "~0").replace("/", "~1")


def summarize(problems: list[FieldProblem]) -> str:
    """One-line detail naming the first few field problems."""
    if not problems:
        return "the request is not valid"
    shown = "; ".join(f"{p.pointer or '/'}: {p.detail}" for p in problems[:_SUMMARY_PROBLEMS])
    more = len(problems) - _SUMMARY_PROBLEMS
    return shown + (f" (and {more} more)" if more > 0 else "")


def _without_location(messages: Any) -> Any:
    """webargs namespaces messages by location ({"json": {...}}); pointers are relative to that part."""
    if isinstance(messages, Mapping) and len(messages) == 1:
        (location,) = messages
        if location in ("json", "form", "files", "query", "querystring", "headers", "view_args"):
            return messages[location]
    return messages


def _too_large_detail() -> str:
    limit = current_app.config.get("MAX_CONTENT_LENGTH")
    sent = request.content_length
    received = f"of {sent} bytes " if sent else ""
    return f"the request body {received}exceeds the limit of {limit} bytes; send a smaller file"
