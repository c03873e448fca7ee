"""Supervise child processes: each in its own process group, stopped in order, none left orphaned.

Each child runs in its own process group, so Ctrl-C reaches only the supervisor, which then stops
the children stage by stage (workers and API first, redis last): SIGTERM, wait, SIGKILL of the
whole group after a grace period. Each child also gets SIGTERM from the kernel if the supervisor
itself dies (PR_SET_PDEATHSIG), so a killed ``sealfold up`` leaves no orphans.

Children's output is appended to ``<log dir>/<name>.log``, kept across starts; a log that grows past
``LOG_MAX_BYTES`` is rotated (copied to ``.1``, older copies shifted up to ``.{LOG_KEEP}``, then truncated:
children write in append mode, so they go on writing at the new end).

Once the stack runs, a restartable child (the API, a worker) that ends is started again after a back-off
(1 s, doubling, at most 30 s); more than ``RESTART_LIMIT`` restarts of one child within
``RESTART_WINDOW_SECONDS`` stop the stack, as does the end of a child that is not restartable (redis).
While the stack starts, any child's end stops it at once.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

_PR_SET_PDEATHSIG = 1
LOG_MAX_BYTES = 10 * 1024 * 1024
LOG_KEEP = 3
RESTART_LIMIT = 5
RESTART_WINDOW_SECONDS = 300.0
BACKOFF_FIRST_SECONDS = 1.0
BACKOFF_MAX_SECONDS = 30.0
START_HEADER = "---- sealfold up: started"


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
    argv: Sequence[str] = ()
    env: Mapping[str, str] = field(default_factory=dict)
    restartable: bool = False
    restarts: list[float] = field(default_factory=list)  # monotonic times of recent restarts
    restart_at: float | None = None  # when a pending restart is due

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
        self, name: str, argv: Sequence[str], env: Mapping[str, str], log_dir: Path, stage: int = 0,
        *, restartable: bool = False,
    ) -> Child:
        """Start ``argv`` as a child in its own process group, output appended to ``log_dir/<name>.log``."""
        self.check()
        log_dir.mkdir(parents=True, exist_ok=True)
        log_path = log_dir / f"{name}.log"
        child = Child(name, _spawn(name, argv, env, log_path), log_path, stage, list(argv), dict(env), restartable)
        self.children.append(child)
        return child

    def check(self, *, restart: bool = False) -> None:
        """Raise ``StopRequested`` after a signal, ``ChildExited`` when a child has ended.

        With ``restart``, a restartable child that ended is started again after its back-off instead,
        until it has used up its restarts.
        """
        if self.stop_signal is not None:
            raise StopRequested(f"received {signal.Signals(self.stop_signal).name}")
        now = time.monotonic()
        for child in self.children:
            if child.process.poll() is None:
                continue
            if not (restart and child.restartable):
                raise ChildExited(child)
            if child.restart_at is None:
                child.restarts = [t for t in child.restarts if t > now - RESTART_WINDOW_SECONDS]
                if len(child.restarts) >= RESTART_LIMIT:
                    raise ChildExited(child)
                delay = min(BACKOFF_MAX_SECONDS, BACKOFF_FIRST_SECONDS * 2 ** len(child.restarts))
                child.restart_at = now + delay
                print(f"sealfold: {child.name} (pid {child.pid}) {describe_exit(child.process.returncode)}; "
                      f"restarting in {delay:.0f} s (restart {len(child.restarts) + 1} of at most {RESTART_LIMIT} "
                      f"in {RESTART_WINDOW_SECONDS / 60:.0f} min)", file=self._err, flush=True)
            elif now >= child.restart_at:
                child.restarts.append(now)
                child.restart_at = None
                child.process = _spawn(child.name, _renamed(child.argv, len(child.restarts)), child.env, child.log_path)

    def rotate_logs(self) -> None:
        """Rotate every child's log that has grown past ``LOG_MAX_BYTES``."""
        for child in self.children:
            rotate_if_large(child.log_path)

    def sleep(self, seconds: float) -> None:
        """Sleep, then ``check``: the one way the supervisor waits while the stack starts."""
        time.sleep(seconds)
        self.check()

    def run_until_stopped(self, poll_seconds: float = 0.2) -> None:
        """Block until a signal (returns), restarting children that end, until one cannot be (``ChildExited``)."""
        ticks = 0
        try:
            while True:
                time.sleep(poll_seconds)
                self.check(restart=True)
                ticks += 1
                if ticks % 50 == 0:
                    self.rotate_logs()
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


def _spawn(name: str, argv: Sequence[str], env: Mapping[str, str], log_path: Path) -> subprocess.Popen[bytes]:
    """Start one child in its own process group, its output appended to ``log_path`` (rotated first if large)."""
    rotate_if_large(log_path)
    with open(log_path, "ab") as log:
        stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        log.write(f"{START_HEADER} {name} at {stamp} ----\n".encode())
        log.flush()
        return subprocess.Popen(
            list(argv), env=dict(env), stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
            process_group=0, preexec_fn=_die_with_parent,
        )


def _renamed(argv: Sequence[str], restart: int) -> list[str]:
    """``argv`` with its ``--name`` value suffixed for a restart: Redis may still hold the old registration."""
    argv = list(argv)
    if "--name" in argv[:-1]:
        at = argv.index("--name") + 1
        argv[at] = f"{argv[at]}-r{restart}"
    return argv


def rotate_if_large(path: Path, max_bytes: int = LOG_MAX_BYTES, keep: int = LOG_KEEP) -> bool:
    """Copy ``path`` to ``path.1`` (shifting older copies up to ``path.<keep>``) and truncate it, when it is
    larger than ``max_bytes``; return whether it rotated. Writers in append mode carry on at the new end."""
    try:
        if path.stat().st_size <= max_bytes:
            return False
    except FileNotFoundError:
        return False
    for n in range(keep - 1, 0, -1):
        older = path.with_name(f"{path.name}.{n}")
        if older.exists():
            os.replace(older, path.with_name(f"{path.name}.{n + 1}"))
    shutil.copyfile(path, path.with_name(f"{path.name}.1"))
    with open(path, "r+b") as log:
        log.truncate(0)
    return True


def _signal_quietly(send: Any, *args: Any) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        send(*args)



def log_tail(path: Path, lines: int = 20) -> str:
    """Return the last ``lines`` lines the latest run wrote to a log file (empty when missing).

    Logs are appended across starts; the tail stops at the latest start's header line.
    """
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return ""
    latest = text.splitlines()
    for i in range(len(latest) - 1, -1, -1):
        if latest[i].startswith(START_HEADER):
            latest = latest[i + 1:]
            break
    return "\n".join(latest[-lines:])
