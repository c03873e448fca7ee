"""Check a JSON answer against the response schema the committed OpenAPI document gives for it."""

from __future__ import annotations

import json
from functools import lru_cache
from typing import Any

from openapi_schema_validator import OAS30Validator

from service.api.spec_export import SPEC_FILE


@lru_cache(maxsize=1)
def committed_spec() -> dict[str, Any]:
    """The committed openapi/openapi.json, parsed once."""
    spec: dict[str, Any] = json.loads(SPEC_FILE.read_text(encoding="utf-8"))
    return spec


def schema_violations(path: str, method: str, status: int, body: Any, mimetype: str = "application/json") -> list[str]:
    """Every way ``body`` breaks the documented schema of that response, one line each (empty: it conforms).

    OAS30Validator reads the schema as OpenAPI 3.0 does (``nullable``, boolean exclusive bounds); the
    component schemas ride along so that ``#/components/...`` references resolve inside the document.
    """
    spec = committed_spec()
    responses = spec["paths"][path][method.lower()]["responses"]
    response = responses.get(str(status)) or responses["default"]
    if "$ref" in response:
        response = spec["components"]["responses"][response["$ref"].rsplit("/", 1)[1]]
    schema = response["content"][mimetype]["schema"]
    validator = OAS30Validator({**schema, "components": spec["components"]})
    return [f"/{'/'.join(map(str, error.absolute_path))}: {error.message[:200]}"
            for error in validator.iter_errors(body)]
