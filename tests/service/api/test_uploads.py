"""Uploads: the key, the role and the size limit are checked before the body is read; bodies spool to disk.

The WSGI input stream here counts the bytes the app reads, so "before the body is read" is a number.
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest
from werkzeug.test import EnvironBuilder, run_wsgi_app

from service.app import create_app
from service.settings import Settings
from service.vault.spool import UploadSpool, spool_dir
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.records import upgraded_engine

if TYPE_CHECKING:
    from tests.support.api import Api

BOUNDARY = "sealfold-test-boundary"


class CountingInput(io.RawIOBase):
    """A WSGI input stream that records how many body bytes were read from it."""

    def __init__(self, body: bytes) -> None:
        self._body = io.BytesIO(body)
        self.consumed = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        chunk = self._body.read(len(buffer))
        buffer[: len(chunk)] = chunk
        self.consumed += len(chunk)
        return len(chunk)


def multipart(content: bytes, **fields: str) -> bytes:
    """Encode form fields and one file part named 'file' (RFC 7578)."""
    parts = [f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="{k}"\r\n\r\n{v}\r\n'.encode()
             for k, v in fields.items()]
    parts.append(f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="file"; filename="data.csv"\r\n'
                 f"Content-Type: text/csv\r\n\r\n".encode() + content + b"\r\n")
    return b"".join(parts) + f"--{BOUNDARY}--\r\n".encode()


def post_upload(api: Api, who: str | None, body: bytes, *, declare_length: bool = True) -> tuple[int, CountingInput]:
    """POST ``body`` to /v1/datasets through the WSGI interface; return the status and the input stream."""
    headers = {}
    if who is not None:
        headers["Authorization"] = f"Bearer {api.tokens.get(who, who)}"
    environ = EnvironBuilder(path="/v1/datasets", method="POST", headers=headers).get_environ()
    stream = CountingInput(body)
    environ["wsgi.input"] = stream
    environ["CONTENT_TYPE"] = f"multipart/form-data; boundary={BOUNDARY}"
    if declare_length:
        environ["CONTENT_LENGTH"] = str(len(body))
    else:  # chunked: the server passes the decoded body on and marks its end (PEP 3333 servers, gunicorn)
        environ.pop("CONTENT_LENGTH", None)
        environ["HTTP_TRANSFER_ENCODING"] = "chunked"
        environ["wsgi.input_terminated"] = True
    answer, status, _headers = run_wsgi_app(api.app, environ, buffered=True)
    b"".join(answer)
    return int(status.split()[0]), stream


def spooled(api: Api) -> list[Path]:
    directory = spool_dir(api.settings)
    return sorted(directory.iterdir()) if directory.exists() else []


MEGABYTE = multipart(b"x,y\n" + b"1,2\n" * 262_144, name="big", target="y", task="regression")


@pytest.mark.parametrize(("who", "status"), [(None, 401), ("not-a-key", 401), ("submitter", 403)])
def test_a_caller_who_may_not_register_is_answered_before_the_body_is_read(api: Api, who: str | None,
                                                                            status: int) -> None:
    assert len(MEGABYTE) > 1_000_000
    answered, stream = post_upload(api, who, MEGABYTE)
    assert answered == status
    assert stream.consumed == 0
    answered, stream = post_upload(api, who, MEGABYTE, declare_length=False)
    assert (answered, stream.consumed) == (status, 0)


def test_a_declared_length_over_the_limit_is_413_with_nothing_read(api: Api) -> None:
    assert len(MEGABYTE) > api.settings.max_upload_bytes
    answered, stream = post_upload(api, "steward", MEGABYTE)
    assert (answered, stream.consumed) == (413, 0)
    assert spooled(api) == []


def test_a_chunked_body_over_the_limit_is_413_and_reading_stops_at_the_limit(api: Api) -> None:
    limit = api.settings.max_upload_bytes
    answered, stream = post_upload(api, "steward", MEGABYTE, declare_length=False)
    assert answered == 413
    assert stream.consumed <= limit + 1 < len(MEGABYTE)
    assert spooled(api) == []


def test_the_file_part_streams_to_a_spool_file_under_the_data_dir(api: Api, monkeypatch: pytest.MonkeyPatch,
                                                                  diabetes_csv: bytes) -> None:
    from service.api import datasets as datasets_api

    seen: list[tuple[Path, bytes]] = []
    register = datasets_api.register_dataset

    def spy(settings: Any, engine: Any, caller: Any, path: Path, fmt: str, declaration: Any) -> dict[str, Any]:
        seen.append((path, path.read_bytes()))
        return register(settings, engine, caller, path, fmt, declaration)

    monkeypatch.setattr(datasets_api, "register_dataset", spy)
    body = multipart(diabetes_csv, name="diabetes", target="target", task="regression")
    answered, stream = post_upload(api, "steward", body)
    assert answered == 201 and stream.consumed == len(body)
    [(path, content)] = seen
    assert path.parent == spool_dir(api.settings) and content == diabetes_csv
    assert spooled(api) == []  # removed once registered


def test_spool_files_left_by_a_killed_upload_are_removed_at_start_up(tmp_path: Path) -> None:
    overrides = {"data_dir": tmp_path / "data", "redis_url": "redis://127.0.0.1:1/0"}
    directory = tmp_path / "data" / "uploads"
    directory.mkdir(parents=True)
    (directory / "0123abcd.part").write_bytes(csv_bytes(diabetes_frame()))
    (directory / "tmpold").mkdir()  # what earlier releases spooled into
    (directory / "tmpold" / "upload.csv").write_bytes(b"a,b\n1,2\n")
    upgraded_engine(Settings.load(overrides, environ={})).dispose()  # what `sealfold db upgrade` does
    app = create_app(overrides)
    with UploadSpool(app.extensions["sealfold"].settings) as live:
        receiving = live.new_file()
        receiving.write(b"a,b\n")
        assert sorted(p.name for p in directory.iterdir()) == [live.path_of(receiving).name]
        # Another API process starting on the same data dir leaves an upload in progress alone.
        create_app(overrides).extensions["sealfold"].engine.dispose()
        assert live.path_of(receiving).exists()
    assert list(directory.iterdir()) == []
    app.extensions["sealfold"].engine.dispose()


@pytest.mark.slow
@pytest.mark.timeout(120)
def test_under_gunicorn_an_anonymous_upload_is_answered_before_its_body_is_sent(tmp_path: Path) -> None:
    """Send only the headers of a 1 MB upload: the 401 comes back while the server still waits for the body."""
    import os
    import socket
    import subprocess
    import sys
    import time

    from tests.support.servers import free_port

    port = free_port()
    upgraded_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={})).dispose()
    env = {**os.environ, "SEALFOLD_DATA_DIR": str(tmp_path), "DATABASE_URL": "", "REDIS_URL": "redis://127.0.0.1:1/0"}
    log = (tmp_path / "gunicorn.log").open("wb")
    server = subprocess.Popen([sys.executable, "-m", "gunicorn", "--bind", f"127.0.0.1:{port}", "--workers", "1",
                               "service.app:create_app()"], env=env, stdout=log, stderr=log)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                sock = socket.create_connection(("127.0.0.1", port), timeout=1)
                break
            except OSError:
                assert server.poll() is None and time.monotonic() < deadline, (tmp_path / "gunicorn.log").read_text()
                time.sleep(0.1)
        with sock:
            sock.settimeout(30)
            sock.sendall(f"POST /v1/datasets HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Length: {len(MEGABYTE)}\r\n"
                         f"Content-Type: multipart/form-data; boundary={BOUNDARY}\r\n\r\n".encode())
            answer = sock.recv(65536)
        assert answer.startswith(b"HTTP/1.1 401 "), answer[:200]
        assert b"application/problem+json" in answer
    finally:
        server.terminate()
        server.wait(timeout=30)
        log.close()
