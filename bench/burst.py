"""Benchmark: a burst of small submissions, end to end, on an embedded stack's workers.

``BURST`` configurations of a 5-fold Ridge on scikit-learn's diabetes data (442 rows, 10 features),
each with its own ``alpha`` so that none is answered with an earlier submission, are POSTed one after
another as fast as the API accepts them; the figure is submissions per minute from just before the
first POST to the last ``finished_at`` the service recorded. Every submission runs its folds, its
summary, its one-time holdout score and its verdict as jobs, as any submission does.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from sklearn.datasets import load_diabetes

from service.cli.client import ServiceClient

BURST = 100
FOLDS = 5
TERMINAL = ("succeeded", "failed", "canceled")


@dataclass(frozen=True)
class BurstResult:
    workers: int
    submissions: int
    post_seconds: float  # until the last POST was answered
    total_seconds: float  # until the last finished_at
    cpu_seconds: dict[str, float] = field(default_factory=dict)  # by the stack's process roles, when measured
    redis_calls: dict[str, float] = field(default_factory=dict)  # Redis commands served, by name, when counted

    @property
    def per_minute(self) -> float:
        return self.submissions / self.total_seconds * 60.0


def register_diabetes(steward: ServiceClient, import_root: Path, name: str) -> str:
    """Write scikit-learn's diabetes data as Parquet, register it by path; return the dataset id."""
    bunch = load_diabetes(as_frame=True)
    frame = bunch.frame.copy()
    frame.insert(0, "rid", range(len(frame)))
    path = import_root / "diabetes.parquet"
    frame.to_parquet(path, index=False)
    reply = steward.post("/v1/datasets", json_body={
        "path": path.name, "name": name, "task": "regression", "target": "target", "id_column": "rid",
        "folds": FOLDS})
    if reply.status != 201:
        raise SystemExit(f"registering the diabetes data answered {reply.status}: {reply.json()}")
    return str(reply.json()["id"])


def burst_configuration(dataset_id: str, index: int) -> dict[str, Any]:
    """The index-th configuration: Ridge with its own alpha, on every feature of the diabetes data."""
    return {
        "dataset": dataset_id,
        "model": {"estimator": "Ridge", "params": {"alpha": round(0.01 * 1.07 ** index, 6)}},
        "validation": {"folds": FOLDS, "repeats": 1},
        "metrics": ["rmse", "r2"],
        "label": f"burst {index}",
    }


def _stamp(text: str) -> float:
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def run_burst(submitter: ServiceClient, dataset_id: str, workers: int, count: int = BURST,
              timeout: float = 1800.0) -> BurstResult:
    """POST ``count`` configurations, wait until every one has finished; return the timing."""
    started_wall, started = time.time(), time.perf_counter()
    ids = []
    for index in range(count):
        reply = submitter.post("/v1/submissions", json_body=burst_configuration(dataset_id, index))
        if reply.status != 202:
            raise SystemExit(f"submission {index} answered {reply.status}: {reply.json()}")
        ids.append(reply.json()["id"])
    post_seconds = time.perf_counter() - started
    # Wait for them oldest first, each polled with its ETag (a 304 costs the API one query), so the
    # waiting takes next to no CPU from the workers; the figure is the finished_at the service recorded.
    etags: dict[str, str] = {}
    for sub_id in ids:
        while True:
            if time.perf_counter() - started > timeout:
                raise SystemExit(f"burst submission {sub_id} unfinished after {timeout:.0f} s")
            headers = {"If-None-Match": etags[sub_id]} if sub_id in etags else {}
            reply = submitter.get(f"/v1/submissions/{sub_id}", headers=headers)
            if reply.status == 200:
                etags[sub_id] = reply.headers.get("etag", "")
                if reply.json()["state"] in TERMINAL:
                    break
            time.sleep(0.2)
    page = submitter.get(f"/v1/submissions?dataset={dataset_id}&limit={count}").json()["submissions"]
    finished = {d["id"]: d for d in page if d["id"] in set(ids)}
    failed = [d for d in finished.values() if d["state"] != "succeeded"]
    if failed:
        raise SystemExit(f"{len(failed)} burst submissions did not succeed, e.g. {failed[0]['id']}: "
                         f"{failed[0]['state']} {failed[0].get('error')}")
    last = max(_stamp(d["finished_at"]) for d in finished.values())
    return BurstResult(workers, len(ids), post_seconds, last - started_wall)


def report_burst(results: list[BurstResult]) -> None:
    print()
    count = results[0].submissions if results else BURST
    print(f"Burst: {count} diabetes 5-fold Ridge submissions (distinct alpha), first POST -> last finished_at")
    for r in results:
        note = ""
        if r.workers == 2:
            note = f"  {'meets' if r.per_minute >= 600 else 'MISSES'} the >= 600/min target"
        print(f"  {r.workers} worker{'s' if r.workers > 1 else ' '}: {r.per_minute:6.0f} submissions/min "
              f"({r.total_seconds:.1f} s; all POSTs answered after {r.post_seconds:.1f} s){note}")
        if r.cpu_seconds:
            spent = ", ".join(f"{role} {seconds * 1000 / r.submissions:.0f}" for role, seconds in r.cpu_seconds.items())
            print(f"{'':>13}CPU ms per submission: {spent} (total {sum(r.cpu_seconds.values()):.1f} s "
                  f"on {os.cpu_count()} cores)")
        if r.redis_calls:
            per = {name: calls / r.submissions for name, calls in r.redis_calls.items() if calls}
            top = ", ".join(f"{name} {n:.0f}" for name, n in sorted(per.items(), key=lambda kv: -kv[1])[:8])
            print(f"{'':>13}Redis commands per submission: {sum(per.values()):.0f} ({top}, ...)")
