"""Read JSON request bodies once, at the edge: broken JSON is a 400, nesting beyond a bound a 422.

Every JSON body the API reads goes through ``parse_json_body`` (webargs' parser in ``blueprint`` and
the hand-read bodies of dataset import and policy). Nothing the service accepts nests more than a
handful of levels, so ``MAX_JSON_DEPTH`` bounds arrays and objects well above that: what passes can
be fingerprinted, stored and echoed by recursive code without reaching Python's recursion limit,
and what goes deeper gets a problem naming where, instead of a RecursionError and a 500.
"""

from __future__ import annotations

import json
from typing import Any

from flask import Request
from werkzeug.exceptions import BadRequest

from service.api.problems import escape_pointer
from service.errors import FieldProblem, InputError

MAX_JSON_DEPTH = 32
Trail = tuple[Any, "Trail"] | None  # (key, the parent's trail): the way from the top to a container


def parse_json_body(raw: str | bytes) -> Any:
    """Decode a JSON body: ValueError when it is not JSON (as ``json.loads``), InputError when it nests too deep."""
    try:
        document = json.loads(raw)
    except RecursionError:
        # The decoder recurses once per level; thousands of levels exhaust the stack before it returns.
        raise _too_deep("") from None
    pointer = nested_too_deep(document, MAX_JSON_DEPTH)
    if pointer is not None:
        raise _too_deep(pointer)
    return document


def request_json(request: Request) -> Any:
    """The request's body as JSON (any value but null), for views that read the body by hand; 400 otherwise."""
    try:
        body = parse_json_body(request.get_data(cache=True))
    except ValueError:  # json.JSONDecodeError, UnicodeDecodeError
        body = None
    if body is None:
        raise BadRequest("the request body is not valid JSON")
    return body


def nested_too_deep(document: Any, limit: int) -> str | None:
    """Return the JSON pointer of an array or object nested more than ``limit`` deep, else None.

    Iterative, so a document of any depth is measured without recursion; the top level is depth 1.
    Each container keeps only its key and its parent's trail: a pointer is spelled out once, if needed.
    """
    containers = (dict, list)
    pending: list[tuple[Any, int, Trail]] = [(document, 1, None)] if isinstance(document, containers) else []
    while pending:
        value, depth, trail = pending.pop()
        if depth > limit:
            keys: list[str] = []
            while trail is not None:
                key, trail = trail
                keys.append(escape_pointer(str(key)))
            return "".join(f"/{key}" for key in reversed(keys))
        items = value.items() if isinstance(value, dict) else enumerate(value)
        for key, child in items:
            if isinstance(child, containers):
                pending.append((child, depth + 1, (key, trail)))
    return None


def _too_deep(pointer: str) -> InputError:
    detail = (f"arrays and objects in a request body may nest at most {MAX_JSON_DEPTH} levels deep; "
              f"this body goes deeper{f' at {pointer}' if pointer else ''}")
    return InputError(detail, [FieldProblem(pointer, detail)])
