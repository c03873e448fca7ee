"""The one HTTP client: raw answers whatever their status, optional key, multipart uploads."""

from __future__ import annotations

import email.parser
import email.policy
import json
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import pytest

from service.cli.client import ServiceClient, Trouble, multipart_body
from tests.support.servers import free_port


class Echo:
    """A standard-library HTTP server that answers ``status`` with what it received, as JSON."""

    def __init__(self, status: int) -> None:
        self.status = status
        echo = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args: Any) -> None:
                pass

            def do_POST(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                raw = json.dumps({"path": self.path, "headers": dict(self.headers.items()),
                                  "body": body.decode("latin-1")}).encode()
                self.send_response(echo.status)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(raw)))
                self.end_headers()
                self.wfile.write(raw)

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"


@pytest.fixture
def echo() -> Iterator[Echo]:
    server = Echo(503)
    thread = threading.Thread(target=server.server.serve_forever, daemon=True)
    thread.start()
    yield server
    server.server.shutdown()
    server.server.server_close()


def test_request_returns_an_error_status_instead_of_raising(echo: Echo) -> None:
    reply = ServiceClient(echo.url, "sf_key").post("/v1/x", json_body={"a": 1})
    assert reply.status == 503
    seen = reply.json()
    assert seen["headers"]["Authorization"] == "Bearer sf_key"
    assert seen["headers"]["Content-Type"] == "application/json"
    assert json.loads(seen["body"]) == {"a": 1}


def test_without_a_key_no_authorization_is_sent(echo: Echo) -> None:
    seen = ServiceClient(echo.url).post("/readyz", body=b"raw", headers={"Content-Type": "text/plain"}).json()
    assert "Authorization" not in seen["headers"]
    assert seen["headers"]["Content-Type"] == "text/plain" and seen["body"] == "raw"


def test_an_unreachable_service_is_trouble() -> None:
    with pytest.raises(Trouble, match="cannot reach the service"):
        ServiceClient(f"http://127.0.0.1:{free_port()}", timeout=2.0).get("/readyz")


def test_multipart_body_parses_as_mime() -> None:
    content = b"a,b\r\n1,2\r\n\x00\xff"
    body, content_type = multipart_body({"name": "rows", "folds": 5, "skipped": None}, "data.csv", content,
                                        "text/csv")
    # Checked with the standard library's MIME parser (RFC 7578 multipart/form-data is RFC 2046 multipart).
    message = email.parser.BytesParser(policy=email.policy.HTTP).parsebytes(
        f"Content-Type: {content_type}\r\n\r\n".encode() + body)
    parts = {p.get_param("name", header="content-disposition"): p for p in message.iter_parts()}
    assert set(parts) == {"name", "folds", "file"}
    assert parts["name"].get_content() == "rows" and parts["folds"].get_content() == "5"
    assert parts["file"].get_filename() == "data.csv" and parts["file"].get_content_type() == "text/csv"
    assert parts["file"].get_payload(decode=True) == content
