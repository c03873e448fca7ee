"""A live sealfold for end-to-end tests: API over real HTTP, real Redis, real forking workers."""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from service.cli.client import ServiceClient
from tests.support.servers import (
    ServedApp,
    stack_environment,
    start_worker,
    stop_processes,
)


@dataclass
class Stack:
    """A running sealfold: API over real HTTP, real Redis, two real forking workers, SQLite records."""

    url: str
    settings: Any
    engine: Any
    tokens: dict[str, str]
    data_dir: Path
    log_path: Path
    workers: list[Any] = field(default_factory=list)
    env: dict[str, str] = field(default_factory=dict)

    def client(self, who: str = "submitter") -> ServiceClient:
        return ServiceClient(self.url, self.tokens.get(who, who), timeout=60.0)

    def wait_for(self, sub_id: str, who: str = "submitter", timeout: float = 120.0) -> dict[str, Any]:
        """Poll a submission until it is finished; fail with the worker log when it takes too long."""
        client = self.client(who)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            doc = client.get(f"/v1/submissions/{sub_id}").json()
            if doc["state"] in ("succeeded", "failed", "canceled"):
                return doc
            time.sleep(0.05)
        log_tail = self.log_path.read_text(errors="replace")[-4000:]
        pytest.fail(f"submission {sub_id} still {doc['state']} after {timeout} s; worker log:\n{log_tail}")


def make_tokens(engine: Any) -> dict[str, str]:
    from service.records.keys import create_key

    tokens = {}
    for who, team, role in (
        ("submitter", "fleet", "submitter"), ("steward", "fleet", "steward"), ("admin", "fleet", "admin"),
        ("other_submitter", "rivals", "submitter"), ("other_steward", "rivals", "steward"),
    ):
        tokens[who] = create_key(engine, team, role, who)[1]
    return tokens


@contextlib.contextmanager
def running_stack(
    data_dir: Path, redis_url: str, queue: str, workers: int = 2, settings: dict[str, Any] | None = None
) -> Iterator[Stack]:
    """Run the API (waitress, real HTTP) and ``workers`` real forking workers on one data dir.

    ``settings`` overrides settings in the API and, through their environment variables, the workers.
    """
    from service.app import create_app
    from service.settings import Settings
    from tests.support.records import upgraded_engine

    import_root = data_dir / "imports"
    import_root.mkdir(parents=True, exist_ok=True)
    overrides = {"data_dir": data_dir, "redis_url": redis_url, "import_root": import_root,
                 "queue_name": queue, "database_url": "", **(settings or {})}
    settings = Settings.load(overrides, environ={})
    engine = upgraded_engine(settings)  # before any process starts, as `sealfold db upgrade` would be
    tokens = make_tokens(engine)
    env = stack_environment(data_dir, redis_url, queue=queue)
    env.update(setting_environment(overrides))
    log_path = data_dir / "workers.log"
    procs = [start_worker(env, f"{queue}-{i}", log_path) for i in range(workers)]
    app = create_app(overrides)
    stack: Stack | None = None
    try:
        with ServedApp(app) as served:
            wait_ready(ServiceClient(served.url), redis_url, procs, log_path)
            stack = Stack(served.url, settings, engine, tokens, data_dir, log_path)
            stack.workers = procs
            stack.env = env
            yield stack
    finally:
        # A test may replace or add workers (stack.workers); every one it leaves is stopped with the stack.
        later = [] if stack is None else [w for w in stack.workers if w not in procs]
        stop_processes(procs + later)
        engine.dispose()


def setting_environment(overrides: dict[str, Any]) -> dict[str, str]:
    """Return the environment variables that carry ``overrides`` to a worker process."""
    from service.settings import _ENV_NAMES

    return {_ENV_NAMES[name]: str(value) for name, value in overrides.items()
            if name in _ENV_NAMES and name not in ("data_dir", "import_root", "database_url")}


def wait_ready(
    client: ServiceClient, redis_url: str, workers: list[Any], log_path: Path, timeout: float = 90.0
) -> None:
    """Wait until the API is ready and every worker has registered itself in Redis."""
    from redis import Redis
    from rq.worker import Worker

    redis = Redis.from_url(redis_url)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        dead = [w for w in workers if w.poll() is not None]
        if dead:
            pytest.fail(f"a worker exited with {dead[0].returncode}:\n{log_path.read_text(errors='replace')[-3000:]}")
        # Each of these workers by its pid: the session's Redis may also hold other tests' registrations.
        registered = {w.pid for w in Worker.all(connection=redis)}
        if client.get("/readyz").status == 200 and {w.pid for w in workers} <= registered:
            return
        time.sleep(0.1)
    pytest.fail(f"stack not ready within {timeout} s:\n{log_path.read_text(errors='replace')[-3000:]}")
