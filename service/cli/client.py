"""Talk to a sealfold service over HTTP with the standard library only, as any other client would.

The one HTTP client of the project: the client commands, the embedded stack's readiness checks and
demo registration, the benchmark and the end-to-end tests all use it. Nothing here reads the
server's files or settings: a CI runner on another host needs only the URL and a key.

``ServiceClient.request`` returns every answer, whatever its status, for callers that look at the
status themselves; ``ServiceClient.call`` insists on the statuses it expects. Failures are sorted
into two exceptions whose exit codes the command line uses:

    ClientError
    +-- Refused   exit 2  the request is wrong: usage, a 4xx problem (its detail and field errors)
    +-- Trouble   exit 3  the service could not answer: connection refused, timeout, 5xx
"""

from __future__ import annotations

import http.client
import json
import urllib.error
import urllib.request
import uuid
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from service import __version__

EXIT_PASS, EXIT_NOT_PASSED, EXIT_REFUSED, EXIT_TROUBLE = 0, 1, 2, 3
REQUEST_TIMEOUT_SECONDS = 30.0
_PROBLEM_FIELDS_SHOWN = 20


class ClientError(Exception):
    """A request that did not give the answer the command needs."""

    exit_code = EXIT_TROUBLE

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class Refused(ClientError):
    """The service (or the command line itself) refused the request as given: fix the input."""

    exit_code = EXIT_REFUSED


class Trouble(ClientError):
    """The service could not be reached or failed: try again later or ask its operators."""

    exit_code = EXIT_TROUBLE


@dataclass(frozen=True)
class Reply:
    """An HTTP answer: status, headers with lower-case names, raw body."""

    status: int
    headers: dict[str, str]
    body: bytes

    def json(self) -> Any:
        """The body as JSON; a body that is not JSON is the service misbehaving (Trouble)."""
        try:
            return json.loads(self.body)
        except ValueError as exc:
            raise Trouble(f"the service answered {self.status} with a body that is not JSON: "
                          f"{self.body[:120]!r}") from exc

    @property
    def text(self) -> str:
        """Decode the body as UTF-8, replacing what does not decode, for messages."""
        return self.body.decode("utf-8", "replace")


class ServiceClient:
    """One base URL, one bearer key (none for the open endpoints); every request has a timeout."""

    def __init__(self, base_url: str, key: str | None = None, timeout: float = REQUEST_TIMEOUT_SECONDS) -> None:
        self.base_url = base_url.rstrip("/")
        self.key = key
        self.timeout = timeout

    def request(self, method: str, path: str, *, json_body: Any = None, body: bytes | None = None,
                headers: Mapping[str, str] | None = None, timeout: float | None = None) -> Reply:
        """Send one request and return the answer, whatever its status; unreachable -> Trouble.

        ``json_body`` is sent as JSON; ``body`` as raw bytes (give its Content-Type in ``headers``).
        """
        all_headers = {"Accept": "application/json", "User-Agent": f"sealfold-cli/{__version__}"}
        if self.key is not None:
            all_headers["Authorization"] = f"Bearer {self.key}"
        data = body
        if json_body is not None:
            data = json.dumps(json_body).encode("utf-8")
            all_headers["Content-Type"] = "application/json"
        all_headers.update(headers or {})
        url = self.base_url + path
        req = urllib.request.Request(url, data=data, method=method, headers=all_headers)
        limit = self.timeout if timeout is None else timeout
        try:
            with urllib.request.urlopen(req, timeout=limit) as resp:
                return Reply(resp.status, _lower(resp.headers.items()), resp.read())
        except urllib.error.HTTPError as err:  # any non-2xx, 304 included
            with err:
                return Reply(err.code, _lower(err.headers.items()), err.read())
        except TimeoutError as exc:
            raise Trouble(f"no answer from {self.base_url} within {limit:g} s") from exc
        except urllib.error.URLError as exc:
            if isinstance(exc.reason, TimeoutError):
                raise Trouble(f"no answer from {self.base_url} within {limit:g} s") from exc
            raise Trouble(f"cannot reach the service at {self.base_url}: {exc.reason}") from exc
        except (OSError, http.client.HTTPException) as exc:
            raise Trouble(f"the connection to {self.base_url} failed: {exc!r}") from exc

    def call(self, method: str, path: str, *, expect: tuple[int, ...] = (200,), **kwargs: Any) -> Reply:
        """Send a request and insist on one of the ``expect`` statuses; else raise Refused or Trouble."""
        reply = self.request(method, path, **kwargs)
        if reply.status in expect:
            return reply
        raise failure(reply, f"{method} {path}")

    def get(self, path: str, **kwargs: Any) -> Reply:
        """Send a GET; the answer whatever its status, as ``request`` gives it."""
        return self.request("GET", path, **kwargs)

    def post(self, path: str, **kwargs: Any) -> Reply:
        """Send a POST; the answer whatever its status, as ``request`` gives it."""
        return self.request("POST", path, **kwargs)

    def delete(self, path: str, **kwargs: Any) -> Reply:
        """Send a DELETE; the answer whatever its status, as ``request`` gives it."""
        return self.request("DELETE", path, **kwargs)

    def upload(self, path: str, filename: str, content: bytes, fields: Mapping[str, Any], *,
               file_type: str = "application/octet-stream", timeout: float | None = None) -> Reply:
        """POST form fields and one file (form field ``file``) as multipart/form-data."""
        data, content_type = multipart_body(fields, filename, content, file_type)
        return self.request("POST", path, body=data, headers={"Content-Type": content_type}, timeout=timeout)


def multipart_body(fields: Mapping[str, Any], filename: str, content: bytes,
                   file_type: str = "application/octet-stream") -> tuple[bytes, str]:
    """Encode form fields (None ones left out) and one file as multipart/form-data; return body and type."""
    boundary = f"sealfold-{uuid.uuid4().hex}"
    parts: list[bytes] = []
    for name, value in fields.items():
        if value is not None:
            parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n{value}\r\n'.encode())
    parts.append(
        f'--{boundary}\r\nContent-Disposition: form-data; name="file"; filename="{filename}"\r\n'
        f"Content-Type: {file_type}\r\n\r\n".encode() + content + b"\r\n"
    )
    parts.append(f"--{boundary}--\r\n".encode())
    return b"".join(parts), f"multipart/form-data; boundary={boundary}"


def failure(reply: Reply, what: str) -> ClientError:
    """Turn an unexpected answer into Refused (4xx) or Trouble (5xx and anything else)."""
    text = problem_text(reply)
    if 400 <= reply.status < 500 and reply.status not in (408, 429):
        return Refused(text)
    if reply.status >= 500 or reply.status in (408, 429):
        return Trouble(text)
    return Trouble(f"{what} answered {reply.status}, which this client does not expect")


def problem_text(reply: Reply) -> str:
    """Describe an error answer: status, title, detail, one line per field problem."""
    try:
        body = json.loads(reply.body)
    except ValueError:
        body = None
    if not isinstance(body, dict):
        snippet = reply.body[:200].decode("utf-8", "replace").strip()
        return f"the service answered {reply.status}" + (f": {snippet}" if snippet else "")
    title = body.get("title") or f"HTTP {reply.status}"
    lines = [f"{reply.status} {title}: {body.get('detail') or ''}".rstrip(": ")]
    raw_errors = body.get("errors")
    errors: list[Any] = raw_errors if isinstance(raw_errors, list) else []
    for item in errors[:_PROBLEM_FIELDS_SHOWN]:
        if isinstance(item, dict):
            lines.append(f"  {item.get('pointer') or '/'}: {item.get('detail')}")
    if len(errors) > _PROBLEM_FIELDS_SHOWN:
        lines.append(f"  (and {len(errors) - _PROBLEM_FIELDS_SHOWN} more)")
    return "\n".join(lines)


def _lower(items: Any) -> dict[str, str]:
    return {str(k).lower(): str(v) for k, v in items}
