"""A tiny HTTP client for the end-to-end tests (standard library only, like any other language's client)."""

from __future__ import annotations

import json
import urllib.error
import urllib.request
import uuid
from dataclasses import dataclass, field
from typing import Any


@dataclass
class Reply:
    """An HTTP answer: status, headers (lower-case names) and body."""

    status: int
    headers: dict[str, str]
    body: bytes

    def json(self) -> Any:
        return json.loads(self.body)

    @property
    def text(self) -> str:
        return self.body.decode("utf-8")


@dataclass
class Client:
    """Talks to one sealfold base URL with one bearer token."""

    base_url: str
    token: str | None = None
    default_headers: dict[str, str] = field(default_factory=dict)

    def with_token(self, token: str | None) -> Client:
        return Client(self.base_url, token, dict(self.default_headers))

    def request(self, method: str, path: str, *, body: bytes | None = None, json_body: Any = None,
                headers: dict[str, str] | None = None) -> Reply:
        all_headers = dict(self.default_headers)
        if self.token is not None:
            all_headers["Authorization"] = f"Bearer {self.token}"
        if json_body is not None:
            body = json.dumps(json_body).encode("utf-8")
            all_headers["Content-Type"] = "application/json"
        all_headers.update(headers or {})
        req = urllib.request.Request(self.base_url + path, data=body, method=method, headers=all_headers)
        try:
            with urllib.request.urlopen(req, timeout=60) as resp:
                return Reply(resp.status, {k.lower(): v for k, v in resp.headers.items()}, resp.read())
        except urllib.error.HTTPError as err:
            return Reply(err.code, {k.lower(): v for k, v in err.headers.items()}, err.read())

    def get(self, path: str, **kw: Any) -> Reply:
        return self.request("GET", path, **kw)

    def post(self, path: str, **kw: Any) -> Reply:
        return self.request("POST", path, **kw)

    def delete(self, path: str, **kw: Any) -> Reply:
        return self.request("DELETE", path, **kw)

    def upload(self, path: str, filename: str, content: bytes, fields: dict[str, Any]) -> Reply:
        """POST a multipart/form-data body with one file and some form fields."""
        boundary = uuid.uuid4().hex
        parts: list[bytes] = []
        for name, value in fields.items():
            if value is None:
                continue
            parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n{value}\r\n'.encode())
        parts.append(
            f'--{boundary}\r\nContent-Disposition: form-data; name="file"; filename="{filename}"\r\n'
            f"Content-Type: application/octet-stream\r\n\r\n".encode() + content + b"\r\n"
        )
        parts.append(f"--{boundary}--\r\n".encode())
        return self.request("POST", path, body=b"".join(parts),
                            headers={"Content-Type": f"multipart/form-data; boundary={boundary}"})
