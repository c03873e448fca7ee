"""Benchmark: how many ``GET /v1/submissions/{id}`` a deployed API answers per second to polling clients.

The API runs as the production image runs it (docker/Dockerfile: gunicorn with
``service.api.gunicorn_conf``, 4 workers x 2 threads), beside the embedded stack whose records and
Redis it shares. ``CLIENTS`` client processes each hold one keep-alive HTTP/1.1 connection and poll
one finished submission as fast as they can, for a few seconds:

- ``304``: every request sends the document's current ETag in ``If-None-Match`` (a client that
  polls and finds nothing new);
- ``200``: no ``If-None-Match``, so every answer is the full document.

The clients share the machine with the API (2 cores here), so the figure is what the API gives with
its polling clients beside it; the records are SQLite (the embedded stack's), not PostgreSQL.

Each figure is measured ``MEASUREMENTS`` times; the median counts against the target and every
measurement is printed, with how the clients' connections sat in gunicorn's processes half-way
through it (read from /proc). Gunicorn's processes accept connections as they wake, so several
kept connections can land in one process while another core idles (one process alone, 1 x 2 threads,
answered about 1,200 304s a second to the 4 clients here); single measurements at about half the
usual rate have also been seen right after a burst.
"""

from __future__ import annotations

import http.client
import multiprocessing
import os
import statistics
import sys
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import urlsplit

from service.cli import embedded, supervisor

CLIENTS = 4
# The production API's process model (docker/Dockerfile's CMD): gunicorn's gthread workers keep
# connections alive, which sync workers would not; 4 processes, so that 4 kept connections rarely all sit
# in one process while the other core idles (2 x 4 threads: 6 measurements in 24; 4 x 2: 2 in 24).
GUNICORN_ARGS = ("--workers", "4", "--threads", "2", "--timeout", "300")
MEASUREMENTS = 3


@dataclass(frozen=True)
class Measurement:
    """One timed run of the clients: answers per second, and the clients' connections per API process."""

    per_second: float
    spread: tuple[int, ...]  # kept connections in each gunicorn worker process, most first


@dataclass(frozen=True)
class PollingResult:
    """Every measurement of each figure, by what the clients asked for."""

    not_modified: list[Measurement]
    full: list[Measurement]
    document_bytes: int

    @property
    def not_modified_per_second(self) -> float:
        return statistics.median(m.per_second for m in self.not_modified)

    @property
    def full_per_second(self) -> float:
        return statistics.median(m.per_second for m in self.full)


@dataclass(frozen=True)
class Gunicorn:
    """The API under gunicorn: where to reach it, and its master process."""

    base_url: str
    port: int
    pid: int


def start_gunicorn(sup: supervisor.Supervisor, env: Mapping[str, str], log_dir: Path) -> Gunicorn:
    """Start the API under gunicorn with the production settings; return it once ready."""
    port = embedded.free_port()
    child = sup.start("api-gunicorn", [
        sys.executable, "-m", "gunicorn", "-c", "python:service.api.gunicorn_conf", "--bind",
        f"127.0.0.1:{port}", *GUNICORN_ARGS, "service.app:create_app()",
    ], env, log_dir)
    base_url = f"http://127.0.0.1:{port}"
    embedded.wait_for_ready(sup, base_url, 60.0)
    return Gunicorn(base_url, port, child.process.pid)


def connection_spread(api: Gunicorn) -> tuple[int, ...]:
    """Count the established connections to ``api.port`` that each gunicorn worker process holds.

    Read from /proc: the worker processes are the master's children, a connection is a socket among a
    process's open files whose inode /proc/net/tcp lists as established (state 01) on the port.
    """
    established = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        fields = line.split()
        if fields[3] == "01" and int(fields[1].rsplit(":", 1)[1], 16) == api.port:
            established.add(fields[9])
    counts = []
    for task in Path(f"/proc/{api.pid}/task").iterdir():
        for pid in (task / "children").read_text().split():
            try:
                links = [os.readlink(fd) for fd in Path(f"/proc/{pid}/fd").iterdir()]
            except FileNotFoundError:  # a process that ended meanwhile
                continue
            counts.append(sum(link.removeprefix("socket:[").removesuffix("]") in established
                              for link in links if link.startswith("socket:[")))
    return tuple(sorted(counts, reverse=True))


def _client(base_url: str, path: str, headers: dict[str, str], expect: int, seconds: float,
            start: multiprocessing.synchronize.Barrier, counts: multiprocessing.queues.Queue[int]) -> None:
    url = urlsplit(base_url)
    conn = http.client.HTTPConnection(url.hostname or "127.0.0.1", url.port, timeout=30)
    conn.connect()
    start.wait()
    done, deadline = 0, time.perf_counter() + seconds
    while time.perf_counter() < deadline:
        conn.request("GET", path, headers=headers)
        reply = conn.getresponse()
        reply.read()
        if reply.status != expect:
            raise SystemExit(f"GET {path} answered {reply.status}, expected {expect}")
        done += 1
    conn.close()
    counts.put(done)


def requests_per_second(api: Gunicorn, path: str, headers: dict[str, str], expect: int, seconds: float) -> Measurement:
    """Run ``CLIENTS`` processes polling ``path`` for ``seconds``; return all their answers per second."""
    context = multiprocessing.get_context("fork")
    start = context.Barrier(CLIENTS + 1)
    counts: multiprocessing.queues.Queue[int] = context.Queue()
    procs = [context.Process(target=_client, args=(api.base_url, path, headers, expect, seconds, start, counts))
             for _ in range(CLIENTS)]
    for proc in procs:
        proc.start()
    start.wait()
    began = time.perf_counter()
    time.sleep(seconds / 2)
    spread = connection_spread(api)
    total = sum(counts.get(timeout=seconds + 60) for _ in procs)
    elapsed = time.perf_counter() - began
    for proc in procs:
        proc.join()
        if proc.exitcode != 0:
            raise SystemExit(f"a polling client ended with exit code {proc.exitcode}")
    return Measurement(total / elapsed, spread)


def bench_polling(api: Gunicorn, token: str, submission_id: str, seconds: float) -> PollingResult:
    """Measure the 304 and the full-document rates on one submission (which should have finished)."""
    path = f"/v1/submissions/{submission_id}"
    auth = {"Authorization": f"Bearer {token}"}
    url = urlsplit(api.base_url)
    conn = http.client.HTTPConnection(url.hostname or "127.0.0.1", url.port, timeout=30)
    conn.request("GET", path, headers=auth)
    first = conn.getresponse()
    body = first.read()
    etag = first.getheader("ETag")
    conn.close()
    if first.status != 200 or not etag:
        raise SystemExit(f"GET {path} answered {first.status} with ETag {etag!r}")
    requests_per_second(api, path, auth | {"If-None-Match": etag}, 304, 1.0)  # warm every thread
    not_modified = [requests_per_second(api, path, auth | {"If-None-Match": etag}, 304, seconds)
                    for _ in range(MEASUREMENTS)]
    full = [requests_per_second(api, path, auth, 200, seconds) for _ in range(MEASUREMENTS)]
    return PollingResult(not_modified, full, len(body))


def _each(measurements: list[Measurement]) -> str:
    return ", ".join(f"{m.per_second:.0f} ({'+'.join(map(str, m.spread))})" for m in measurements)


def report_polling(result: PollingResult, seconds: float) -> None:
    print()
    print(f"Polling GET /v1/submissions/{{id}}: gunicorn {' '.join(GUNICORN_ARGS)}, {CLIENTS} keep-alive client "
          f"processes on the same machine, median of {MEASUREMENTS} measurements of {seconds:.0f} s")
    verdict_304 = "meets" if result.not_modified_per_second >= 1000 else "MISSES"
    verdict_200 = "meets" if result.full_per_second >= 400 else "MISSES"
    print(f"  matching If-None-Match (304): {result.not_modified_per_second:8.0f} req/s  "
          f"{verdict_304} the >= 1,000 req/s target")
    print(f"  full document (200, {result.document_bytes:,} bytes): {result.full_per_second:8.0f} req/s  "
          f"{verdict_200} the >= 400 req/s target")
    print("  each measurement, req/s (the clients' connections per API process half-way through):")
    print(f"    304: {_each(result.not_modified)}")
    print(f"    200: {_each(result.full)}")
