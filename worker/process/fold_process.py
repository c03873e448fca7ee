"""Run fold jobs in a long-lived child of the worker, forked once and reused job after job.

RQ forks a work horse for every job and waits for it to exit. For a fold that meant 30-60 ms of
fork, copy-on-write faults, new DB and Redis connections and exit on a 2-core machine, per job:
more than a whole fold on a small table, and a quarter of a submission's time at a million rows.
So the worker runs a fold job in its own process, as RQ sees it (``worker.process.placement``), and hands
the work to this child over a pipe:

- isolation stays: a fold that overruns its timeout is stopped by killing the child, even inside a
  long C call (RQ's alarm interrupts the parent's wait, not the fit); a child that crashes (a
  segfault, the OOM killer) fails only its job, which RQ retries, and the next job gets a new child;
- the child is forked after the worker has preloaded and warmed up, so it starts warm and stays
  warm: its DB connection, the pages it copied and scikit-learn's lazy set-up serve every later job;
- memory: the child keeps what it freed for the next job (glibc serves big arrays from its heap
  instead of fresh mappings, ``_keep_freed_memory``): a fold's copies of its rows then reuse pages
  the kernel need not zero again -- on a VM, pages the host need not hand back again either --
  which takes some 10-20 % off a fold at a million rows. A child whose resident size grew by more
  than ``REPLACE_AFTER_GROWTH_BYTES`` since its first job is replaced after the job, so what a huge
  fold leaves behind does not linger;
- it dies with the worker: its parent's death closes the pipe it reads, and it asks the kernel for
  SIGKILL when its parent dies.

Only ``worker.jobs.fold.run_fold`` runs there. Requests and answers are length-prefixed JSON; nothing is
pickled. The holdout job never comes here: it runs in a work horse that ends with the job.
"""

from __future__ import annotations

import contextlib
import ctypes
import json
import logging
import os
import signal
import struct
import traceback
from typing import Any

from worker.jobs import runtime
from worker.jobs.failure import KilledBySystem, lift_memory_limit, limit_memory
from worker.jobs.fold import run_fold

log = logging.getLogger(__name__)

REPLACE_AFTER_GROWTH_BYTES = 1 << 30
_HEADER = struct.Struct(">I")
_PR_SET_PDEATHSIG = 1


class FoldProcessError(Exception):
    """A fold job did not complete in the fold process."""


class FoldFailed(FoldProcessError):
    """The fold job raised in the fold process; the message carries its type, text and traceback."""


class FoldProcessDied(FoldProcessError):
    """The fold process ended while it ran a job (killed, crashed)."""


class FoldProcessKilled(FoldProcessDied, KilledBySystem):
    """A SIGKILL this worker did not send ended the fold process: the kernel's OOM killer, most likely.

    Nothing else on a worker host sends SIGKILL to a fold process (the job timeout and RQ's stop command
    kill it through ``FoldProcess``, which remembers doing so), so the job fails as a memory failure
    (``worker.jobs.failure.classify``), not as a crash.
    """


class FoldProcess:
    """The parent's handle on the child: start it, run one fold at a time in it, stop it."""

    def __init__(self) -> None:
        self.pid: int | None = None
        self._send = -1
        self._receive = -1
        self._settled_rss: int | None = None
        self._killed_here = False  # this worker sent the SIGKILL that may end the running job

    def start(self) -> None:
        """Fork the child unless a live one is there.

        The worker starts it before any thread of its own exists. A replacement forked inside a
        job runs beside the heartbeat thread, which holds nothing the child uses: the child never
        touches Redis, gets a fresh DB pool, and Python re-creates the logging locks in a child.
        """
        if self.pid is not None:
            if _alive(self.pid):
                return
            self.pid = None  # it ended while idle, and _alive reaped it
        self.stop()
        to_child, from_parent = os.pipe()
        to_parent, from_child = os.pipe()
        pid = os.fork()
        if pid == 0:  # the child: never returns
            os.close(from_parent)
            os.close(to_parent)
            _serve(to_child, from_child)
        os.close(to_child)
        os.close(from_child)
        self.pid, self._send, self._receive = pid, from_parent, to_parent
        self._settled_rss = None
        log.info("fold process started (pid %d)", pid)

    def run_fold(self, submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
        """Run one fold job in the child and return its answer.

        Anything that interrupts the wait -- RQ's job timeout above all -- kills the child first, so
        the fold stops with it; the next job starts a new one.
        """
        self.start()
        self._killed_here = False
        try:
            _write_message(self._send, {"submission_id": submission_id, "repeat": repeat, "fold": fold})
            answer = _read_message(self._receive)
        except BrokenPipeError:
            answer = None
        except BaseException:
            self.stop()
            raise
        if answer is None:
            how = self._reap()
            where = f"fold {fold} of repeat {repeat} of {submission_id}"
            if how == f"was killed by {signal.SIGKILL.name}" and not self._killed_here:
                raise FoldProcessKilled(f"the fold process was killed by the operating system (SIGKILL), most likely "
                                        f"out of memory, while it ran {where}")
            raise FoldProcessDied(f"the fold process {how} while it ran {where}; the job is retried in a new one")
        if answer.get("replace"):
            self.stop()  # it failed an allocation: start the next job in a fresh one
        self._replace_if_grown()
        if "error" in answer:
            raise FoldFailed(f"{answer['error']}\n--- in the fold process:\n{answer['trace']}")
        result: dict[str, Any] = answer["result"]
        return result

    def kill(self) -> None:
        """Kill the child from another thread; the thread waiting on it sees it die and reaps it."""
        pid = self.pid
        if pid is not None:
            self._killed_here = True
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)

    def stop(self) -> None:
        """Kill the child (if any) and forget it."""
        if self.pid is not None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(self.pid, signal.SIGKILL)
            self._reap()
        for fd in (self._send, self._receive):
            if fd >= 0:
                os.close(fd)
        self._send = self._receive = -1

    def _reap(self) -> str:
        pid, self.pid = self.pid, None
        if pid is None:
            return "was not running"
        try:
            _, status = os.waitpid(pid, 0)
        except ChildProcessError:
            return "ended"
        if os.WIFSIGNALED(status):
            return f"was killed by {signal.Signals(os.WTERMSIG(status)).name}"
        return f"exited with code {os.waitstatus_to_exitcode(status)}"

    def _replace_if_grown(self) -> None:
        if self.pid is None:
            return
        rss = _resident_bytes(self.pid)
        if rss is None:
            return
        if self._settled_rss is None:
            self._settled_rss = rss  # after the first job: warm, with its connection and copied pages
        elif rss > self._settled_rss + REPLACE_AFTER_GROWTH_BYTES:
            log.info("fold process %d grew to %d MiB; replacing it", self.pid, rss >> 20)
            self.stop()


def _serve(receive: int, send: int) -> None:
    """The child's loop: run each requested fold, answer, until the parent closes the pipe."""
    code = 0
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C and SIGTERM are the worker's to handle;
        signal.signal(signal.SIGTERM, signal.SIG_IGN)  # it stops this process when it stops
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        _keep_freed_memory(libc)
        runtime.after_fork()
        os.nice(runtime.current().settings.job_nice)  # the API and checkers on this host come first
        while (request := _read_message(receive)) is not None:
            ctx = runtime.current()
            try:
                limit_memory(ctx.settings.memory_limit_mib)  # what this fold may add, from here
                answer: dict[str, Any] = {"result": run_fold(
                    ctx, str(request["submission_id"]), int(request["repeat"]), int(request["fold"]))}
            except MemoryError as exc:
                answer = {"error": f"MemoryError: {exc}", "trace": "", "replace": True}
            except Exception as exc:
                answer = {"error": f"{type(exc).__name__}: {exc}", "trace": traceback.format_exc()}
            finally:
                lift_memory_limit()
            _write_message(send, answer)
    except BaseException:
        log.exception("fold process failed")
        code = 1
    finally:
        os._exit(code)


def _keep_freed_memory(libc: ctypes.CDLL) -> None:
    """Make glibc serve every allocation from its heap and keep up to 1 GiB freed at its top.

    By default an array over 32 MiB gets a mapping of its own, returned to the kernel when freed, so
    each fold faulted in (and had zeroed) every page of its row copies again. Not mapping anything
    separately (M_MMAP_MAX 0) and trimming the heap only above 1 GiB free (M_TRIM_THRESHOLD) lets
    the next fold reuse them. The growth allowance of ``FoldProcess`` bounds what is kept.
    """
    m_trim_threshold, m_mmap_max = -1, -4  # glibc's malloc.h
    libc.mallopt(m_mmap_max, 0)
    libc.mallopt(m_trim_threshold, REPLACE_AFTER_GROWTH_BYTES)


def _write_message(fd: int, message: dict[str, Any]) -> None:
    body = json.dumps(message).encode()
    data = memoryview(_HEADER.pack(len(body)) + body)
    while data:
        data = data[os.write(fd, data):]


def _read_message(fd: int) -> dict[str, Any] | None:
    """Read one message; None when the other side closed the pipe before a whole one arrived."""
    header = _read_exactly(fd, _HEADER.size)
    if header is None:
        return None
    body = _read_exactly(fd, _HEADER.unpack(header)[0])
    if body is None:
        return None
    message: dict[str, Any] = json.loads(body)
    return message


def _read_exactly(fd: int, size: int) -> bytes | None:
    chunks, left = [], size
    while left:
        chunk = os.read(fd, left)
        if not chunk:
            return None
        chunks.append(chunk)
        left -= len(chunk)
    return b"".join(chunks)


def _alive(pid: int) -> bool:
    """Tell whether a child still runs; one that ended is reaped here."""
    try:
        done, _status = os.waitpid(pid, os.WNOHANG)
    except ChildProcessError:
        return False
    return done == 0


def _resident_bytes(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError):
        return None
    return None
