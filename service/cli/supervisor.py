"""Supervise child processes: each in its own process group, stopped in order, none left orphaned.

Each child runs in its own process group, so Ctrl-C reaches only the supervisor, which then stops
the children stage by stage (workers and API first, redis last): SIGTERM, wait, SIGKILL of the
whole group after a grace period. Each child also gets SIGTERM from the kernel if the supervisor
itself dies (PR_SET_PDEATHSIG), so a killed ``sealfold up`` leaves no orphans. Children's output
goes to log files.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

_PR_SET_PDEATHSIG = 1


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



def log_tail(path: Path, lines: int = 20) -> str:
    """Return the last ``lines`` lines of a log file (empty when missing)."""
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return ""
    return "\n".join(text.splitlines()[-lines:])
