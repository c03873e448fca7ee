"""sealfold's flask-smorest classes: auth decorator, problem responses, strict JSON bodies.

flask-smorest ships no type hints, so under type checking its two classes are replaced by typed
stand-ins describing the part of their API used here; at run time they are the real classes.
"""

from __future__ import annotations

import functools
import http
from collections.abc import Callable
from typing import TYPE_CHECKING, Any, TypeVar, cast

import flask
from flask import Flask
from webargs import core as webargs_core
from webargs.flaskparser import FlaskParser, is_json_request

from service.api import problems
from service.api.bodies import parse_json_body
from service.api.schemas import ProblemSchema
from service.errors import UnsupportedFormat

_T = TypeVar("_T")
_View = TypeVar("_View", bound=Callable[..., Any])

if TYPE_CHECKING:

    class _SmorestBlueprint:
        """Typed stand-in for ``flask_smorest.Blueprint``."""

        ARGUMENTS_PARSER: FlaskParser

        def __init__(self, name: str, import_name: str, **options: Any) -> None: ...
        def route(self, rule: str, **options: Any) -> Callable[[_T], _T]: ...
        def arguments(self, schema: Any, **options: Any) -> Callable[[_T], _T]: ...
        def response(self, status_code: int, schema: Any = None, **options: Any) -> Callable[[_T], _T]: ...
        def alt_response(self, status_code: int, **options: Any) -> Callable[[_T], _T]: ...
        def doc(self, **options: Any) -> Callable[[_T], _T]: ...

    class _SmorestApi:
        """Typed stand-in for ``flask_smorest.Api``."""

        ERROR_SCHEMA: Any
        DEFAULT_ERROR_RESPONSE_NAME: str
        spec: Any
        _app: Flask

        def __init__(self, app: Flask | None = None, **options: Any) -> None: ...
        def register_blueprint(self, blp: Any, **options: Any) -> None: ...

    def prepare_response(response: dict[str, Any], spec: Any, content_type: str) -> None: ...

else:
    from flask_smorest import Api as _SmorestApi
    from flask_smorest import Blueprint as _SmorestBlueprint
    from flask_smorest.utils import prepare_response


class JsonOnlyParser(FlaskParser):
    """webargs parser that answers 415 for a body that is not JSON, instead of 'missing field' 422s.

    The body is decoded by ``bodies.parse_json_body``, which bounds its nesting.
    """

    def _raw_load_json(self, req: flask.Request) -> Any:
        if not is_json_request(req):
            if not req.content_length and not req.mimetype:
                return webargs_core.missing
            received = req.mimetype or "no content type"
            raise UnsupportedFormat(f"send the request body as application/json, got {received}")
        return parse_json_body(req.get_data(cache=True).decode("utf-8"))


class SealfoldBlueprint(_SmorestBlueprint):
    """A flask-smorest blueprint with sealfold's auth decorator, problem responses and strict JSON bodies."""

    ARGUMENTS_PARSER = JsonOnlyParser()

    def problem(self, status: int, description: str) -> Callable[[_View], _View]:
        """Document an error response of an operation as a problem document."""
        return self.alt_response(
            status, schema=ProblemSchema, content_type=problems.PROBLEM_MIMETYPE, description=description
        )

    def requires(self, role: str) -> Callable[[_View], _View]:
        """Authenticate and authorize before anything else runs (body parsing included).

        Put it above ``@blp.arguments`` so a request without a valid key gets a 401, never a 422.
        The view reads the caller with ``auth.current_key()``.
        """
        unauthorized = self.problem(401, "No key, or a key that is not valid")
        forbidden = self.problem(403, f"The key's role is below {role}")

        def decorator(view: _View) -> _View:
            @functools.wraps(view)
            def wrapper(*args: Any, **kwargs: Any) -> Any:
                from service.api.auth import require

                require(role)
                return view(*args, **kwargs)

            return unauthorized(forbidden(cast(_View, wrapper)))

        return decorator


class SealfoldApi(_SmorestApi):
    """flask-smorest's Api with problem+json errors, in the handlers and in the generated spec."""

    ERROR_SCHEMA = ProblemSchema

    def _register_error_handlers(self) -> None:
        problems.install(self._app)

    def _register_responses(self) -> None:
        # As flask-smorest's own, except that error bodies are documented as application/problem+json.
        for status in http.HTTPStatus:
            response: dict[str, Any] = {"description": status.phrase}
            if status >= 400:
                response["schema"] = self.ERROR_SCHEMA
            prepare_response(response, self.spec, problems.PROBLEM_MIMETYPE)
            self.spec.components.response(status.name, response, lazy=True)
        default: dict[str, Any] = {"description": "Error (problem details)", "schema": self.ERROR_SCHEMA}
        prepare_response(default, self.spec, problems.PROBLEM_MIMETYPE)
        self.spec.components.response(self.DEFAULT_ERROR_RESPONSE_NAME, default, lazy=True)
