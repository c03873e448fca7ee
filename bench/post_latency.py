"""Benchmark: how long a POST /v1/submissions takes to answer while every fold worker is busy.

An embedded stack (redis-server, API, 2 fold workers, 1 checker, SQLite) in a temporary directory.
First every fold worker is made busy: slow submissions (GradientBoostingRegressor, 500 trees of depth 8,
on 4,000 rows of scikit-learn's make_regression) fill the work queue. Then, while the started registry
shows as many running jobs as there are fold workers, one client POSTs configurations one after the
other on scikit-learn's diabetes table: new valid ones (answered 202) and ones that cannot fit or break a
cap (answered 422), and the wall time of each POST is recorded. Printed: p50, p99 and max per answer,
the count of each status, and how many of the POSTs found every fold worker busy.

Run: ``python -m bench.post_latency`` (``--posts 200`` for more). It asserts nothing.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from redis import Redis
from sklearn.datasets import load_diabetes, make_regression

from service.cli import embedded, supervisor
from service.cli.client import ServiceClient
from service.records.engine import make_engine
from service.records.keys import create_key
from service.settings import Settings
from service.submission import team_queues


def _csv(frame: pd.DataFrame) -> bytes:
    return frame.to_csv(index=False).encode()


def _register(steward: ServiceClient, frame: pd.DataFrame, name: str, target: str) -> str:
    reply = steward.upload("/v1/datasets", "data.csv", _csv(frame),
                           {"name": name, "target": target, "task": "regression"})
    if reply.status != 201:
        raise SystemExit(f"registering {name} answered {reply.status}: {reply.text}")
    return str(reply.json()["id"])


def _bodies(dataset_id: str, count: int) -> list[tuple[str, dict[str, Any]]]:
    """Alternate new valid configurations (202) with refused ones (422): 3 valid to 1 refused."""
    refused = [
        {"estimator": "SVR", "params": {"kernel": "precomputed"}},  # the trial fit fails
        {"estimator": "Ridge", "params": {"alpha": -1.0}},  # scikit-learn's validation
        {"estimator": "RandomForestRegressor", "params": {"n_estimators": 5000}},  # a cap
    ]
    out = []
    for i in range(count):
        if i % 4 == 3:
            out.append(("refused", {"dataset": dataset_id, "model": refused[(i // 4) % len(refused)]}))
        else:
            out.append(("valid", {"dataset": dataset_id, "model": {"estimator": "Ridge",
                                                                   "params": {"alpha": 0.01 + i * 0.013}}}))
    return out


def _pct(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) if values else float("nan")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--posts", type=int, default=100, help="POSTs to time (default 100)")
    parser.add_argument("--workers", type=int, default=2, help="fold workers (default 2)")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="sealfold-postbench-") as tmp:
        env = {"SEALFOLD_LOG_LEVEL": "WARNING", "SEALFOLD_QUEUE": "postbench"}
        options = embedded.StackOptions(data_dir=Path(tmp) / "data", port=0, workers=args.workers, extra_env=env)
        with supervisor.Supervisor() as sup:
            print(f"starting an embedded stack: {args.workers} fold workers and a checker, in {tmp}", flush=True)
            stack = embedded.start_stack(sup, options)
            settings = Settings.load(environ=stack.env)
            engine = make_engine(settings)
            steward = ServiceClient(stack.base_url, create_key(engine, "bench", "steward", "s")[1], timeout=120)
            submitter = ServiceClient(stack.base_url, create_key(engine, "bench", "submitter", "u")[1], timeout=120)
            engine.dispose()

            X, y = make_regression(n_samples=4000, n_features=8, noise=1.0, random_state=5)
            slow_id = _register(steward, pd.DataFrame(X, columns=[f"x{i}" for i in range(8)]).assign(y=y),
                                "slow", "y")
            quick_id = _register(steward, load_diabetes(as_frame=True).frame, "diabetes", "target")
            # Warm the checker's sample cache for the quick dataset, as a first POST on it would.
            submitter.post("/v1/submissions", json_body={"dataset": quick_id, "model": {"estimator": "Ridge"}})

            redis = Redis.from_url(stack.redis_url)
            for depth in (8, 7, 6):  # enough slow work to keep every fold worker busy throughout
                reply = submitter.post("/v1/submissions", json_body={"dataset": slow_id, "model": {
                    "estimator": "GradientBoostingRegressor", "params": {"n_estimators": 500, "max_depth": depth}}})
                if reply.status != 202:
                    raise SystemExit(f"a slow submission answered {reply.status}: {reply.text}")
            def running() -> int:  # jobs running now, over every team's queue
                return len(team_queues.started_job_ids(redis, settings))

            deadline = time.monotonic() + 120
            while running() < args.workers:
                if time.monotonic() > deadline:
                    raise SystemExit("the fold workers never all got busy")
                time.sleep(0.05)
            print(f"every fold worker busy ({running()} jobs running); timing {args.posts} POSTs",
                  flush=True)

            times: dict[str, list[float]] = {"valid": [], "refused": []}
            statuses: dict[int, int] = {}
            all_busy = 0
            for kind, body in _bodies(quick_id, args.posts):
                all_busy += running() >= args.workers
                began = time.perf_counter()
                reply = submitter.post("/v1/submissions", json_body=body)
                elapsed = time.perf_counter() - began
                statuses[reply.status] = statuses.get(reply.status, 0) + 1
                times[kind].append(elapsed)
            still_busy = running()

    every = times["valid"] + times["refused"]
    print(f"\nPOST /v1/submissions with {args.workers} fold workers busy ({all_busy} of {args.posts} POSTs sent "
          f"while every fold worker ran a job; {still_busy} jobs running at the end)")
    print(f"statuses: {dict(sorted(statuses.items()))}")
    for kind, values in (("all", every), ("202 (valid)", times["valid"]), ("422 (refused)", times["refused"])):
        if values:
            print(f"  {kind:14s} n={len(values):4d}  p50 {_pct(values, 50) * 1000:7.1f} ms  "
                  f"p99 {_pct(values, 99) * 1000:7.1f} ms  max {max(values) * 1000:7.1f} ms  "
                  f"mean {statistics.fmean(values) * 1000:7.1f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
