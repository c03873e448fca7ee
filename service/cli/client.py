"""Talk to a sealfold service over HTTP with the standard library only, as any other client would.

Nothing here reads the server's files or settings: a CI runner on another host needs only the
URL and a key. Failures are sorted into two exceptions whose exit codes the command line uses:

    ClientError
    +-- Refused   exit 2  the request is wrong: usage, a 4xx problem (its detail and field errors)
    +-- Trouble   exit 3  the service could not answer: connection refused, timeout, 5xx
"""

from __future__ import annotations

import http.client
import json
import urllib.error
import urllib.request
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


class ServiceClient:
    """One base URL, one bearer key; every request has a timeout."""

    def __init__(self, base_url: str, key: str, timeout: float = REQUEST_TIMEOUT_SECONDS) -> None:
        self.base_url = base_url.rstrip("/")
        self.key = key
        self.timeout = timeout

    def request(self, method: str, path: str, *, json_body: Any = None, headers: dict[str, str] | None = None,
                timeout: float | None = None) -> Reply:
        """Send one request and return the answer, whatever its status; unreachable -> Trouble."""
        all_headers = {"Authorization": f"Bearer {self.key}", "Accept": "application/json",
                       "User-Agent": f"sealfold-cli/{__version__}", **(headers or {})}
        data = None
        if json_body is not None:
            data = json.dumps(json_body).encode("utf-8")
            all_headers["Content-Type"] = "application/json"
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
