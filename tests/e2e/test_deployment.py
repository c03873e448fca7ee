"""The README's deployment on a fresh PostgreSQL database: `sealfold db upgrade`, then gunicorn with 4 workers.

Before migrations every gunicorn worker created the tables at start and they raced (duplicate type,
duplicate table); with ``--preload`` the workers shared the master's connection. Here the upgrade runs
once, gunicorn boots 4 workers with and without ``--preload``, and 200 requests (sequential and
concurrent, anonymous and authenticated) must all answer 200 with every worker still alive.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families
from redis import Redis
from rq.worker import Worker

from service.cli.client import ServiceClient, Trouble
from service.records import schema
from tests.support.servers import free_port, postgres_database, sealfold_argv

pytestmark = [pytest.mark.postgres, pytest.mark.slow]

GUNICORN = Path(sys.prefix) / "bin" / "gunicorn"
WORKERS = 4


def _readyz_count(text: str) -> float:
    # prometheus-client's parser is the reference for the exposition format.
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == "sealfold_http_requests_total" and sample.labels.get("route") == "/readyz":
                return float(sample.value)
    return 0.0


def _children(pid: int) -> list[int]:
    return [int(p) for p in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]


def _wait_healthy(client: ServiceClient, proc: subprocess.Popen[bytes], log: Path, timeout: float = 90.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, f"gunicorn exited with {proc.returncode}:\n{log.read_text()}"
        try:
            if client.request("GET", "/healthz").status == 200 and len(_children(proc.pid)) == WORKERS:
                return
        except Trouble:  # not listening yet
            pass
        time.sleep(0.1)
    raise AssertionError(f"gunicorn was not healthy within {timeout} s:\n{log.read_text()}")


@pytest.mark.parametrize("preload", [False, True], ids=["per-worker-app", "preload"])
def test_a_fresh_postgresql_database_serves_200_requests_from_4_gunicorn_workers(
    preload: bool, tmp_path: Path, redis_url: str,
) -> None:
    with postgres_database() as url:
        env = {**os.environ, "DATABASE_URL": url, "SEALFOLD_DATA_DIR": str(tmp_path / "data"), "REDIS_URL": redis_url,
               "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
        started = time.perf_counter()
        upgraded = subprocess.run([*sealfold_argv(), "db", "upgrade"], env=env, capture_output=True, text=True,
                                  timeout=120)
        upgrade_seconds = time.perf_counter() - started
        assert upgraded.returncode == 0, upgraded.stderr
        assert upgraded.stdout == f"records database at revision {schema.head_revision()} (upgraded from none)\n"
        tokens = {}
        for role in ("steward", "submitter"):
            made = subprocess.run([*sealfold_argv(), "keys", "create", "--team", "fleet", "--role", role],
                                  env=env, capture_output=True, text=True, timeout=60)
            assert made.returncode == 0, made.stderr
            tokens[role] = made.stdout.strip()

        port = free_port()
        log = tmp_path / "gunicorn.log"
        argv = [str(GUNICORN), "-c", "python:service.api.gunicorn_conf", "--workers", str(WORKERS),
                "--bind", f"127.0.0.1:{port}", "--timeout", "60",
                *(["--preload"] if preload else []), "service.app:create_app()"]
        # /readyz needs a live worker: register one in Redis as a started `sealfold worker` does.
        stand_in = Worker(["sealfold"], connection=Redis.from_url(redis_url), name=f"w-{port}")
        stand_in.register_birth()
        with log.open("wb") as out:
            proc = subprocess.Popen(argv, env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
        try:
            started = time.perf_counter()
            base = f"http://127.0.0.1:{port}"
            _wait_healthy(ServiceClient(base), proc, log)
            boot_seconds = time.perf_counter() - started
            workers_at_boot = sorted(_children(proc.pid))

            clients = {None: ServiceClient(base), **{r: ServiceClient(base, key=t) for r, t in tokens.items()}}
            calls = [(None, "/readyz"), ("steward", "/v1/datasets"), ("submitter", "/v1/catalog"),
                     ("submitter", "/v1/submissions")]

            def call(i: int) -> tuple[int, str]:
                who, path = calls[i % len(calls)]
                reply = clients[who].request("GET", path)
                return reply.status, f"{who} {path}: {reply.body[:200]!r}"

            sequential = [call(i) for i in range(80)]
            with ThreadPoolExecutor(max_workers=16) as pool:
                concurrent = list(pool.map(call, range(80, 200)))
            answers = sequential + concurrent
            assert len(answers) == 200
            failures = [text for status, text in answers if status != 200]
            assert failures == [], failures[:5]
            assert proc.poll() is None and sorted(_children(proc.pid)) == workers_at_boot  # no worker died
            # Every scrape, whichever gunicorn worker answers it, sees the requests of all four (the counter
            # once went backwards between scrapes when each process counted its own).
            readyz_calls = sum(1 for i in range(200) if calls[i % len(calls)][1] == "/readyz")
            seen = [_readyz_count(clients[None].request("GET", "/metrics").body.decode()) for _ in range(8)]
            assert seen == [readyz_calls] * 8, seen
            logged = log.read_text()
            assert "Traceback" not in logged and "Worker failed to boot" not in logged, logged
            print(f"\n[{'preload' if preload else 'per-worker app'}] db upgrade {upgrade_seconds:.2f} s, "
                  f"gunicorn {WORKERS} workers healthy in {boot_seconds:.2f} s, "
                  f"200 requests: {sum(s == 200 for s, _ in answers)} x 200")
        finally:
            proc.terminate()
            proc.wait(timeout=30)
            stand_in.register_death()  # the session's Redis is shared with later tests
