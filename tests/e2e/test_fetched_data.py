"""A worker with no shared disk: it fetches dataset files from the API into its own empty data dir.

A real API (waitress) with a worker secret, a real redis-server and real worker processes: a submission run by
the usual shared-disk worker, then the same model run by a worker started with ``SEALFOLD_DATA_SOURCE=api`` and
an empty data dir of its own, give the same fold scores; the worker's cache then holds the API's bytes of the
development files and no copy of the sealed file, and a cached file damaged on disk is fetched again before the
next job uses it.
"""

from __future__ import annotations

import hashlib
import os
import stat
import time
import uuid
from pathlib import Path
from typing import Any

import pytest
from redis import Redis
from rq.worker import Worker

from service.vault.store import dataset_paths
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import start_worker, stop_processes
from tests.support.stack import Stack, running_stack
from worker.process.fetched_data import DataFetcher

SECRET = "e2e-worker-secret"
MODEL = {"estimator": "Ridge", "params": {"alpha": 1.0}, "features": ["age", "bmi", "bp", "s5"],
         "preprocess": [{"transformer": "StandardScaler", "columns": ["age", "bmi", "bp", "s5"]}]}


def _run(stack: Stack, ds_id: str, metrics: list[str]) -> dict[str, Any]:
    # Different metric lists make different configurations (one submission per configuration and team).
    reply = stack.client().post("/v1/submissions", json_body={"dataset": ds_id, "model": MODEL, "metrics": metrics})
    assert reply.status == 202, reply.text
    doc = stack.wait_for(reply.json()["id"])
    assert doc["state"] == "succeeded", doc
    return doc


def _scores(doc: dict[str, Any], metrics: list[str]) -> list[tuple[int, int, list[float]]]:
    folds = sorted(doc["result"]["cv"]["folds"], key=lambda f: (f["repeat"], f["fold"]))
    return [(f["repeat"], f["fold"], [f["scores"][m] for m in metrics]) for f in folds]


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _wait_registered(redis_url: str, proc: Any, name: str, log_path: Path) -> None:
    redis = Redis.from_url(redis_url)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            pytest.fail(f"the fetching worker exited with {proc.returncode}:\n"
                        f"{log_path.read_text(errors='replace')[-3000:]}")
        if any(w.name == name for w in Worker.all(connection=redis)):
            return
        time.sleep(0.2)
    pytest.fail(f"the fetching worker did not register:\n{log_path.read_text(errors='replace')[-3000:]}")


def test_a_worker_without_the_shared_disk_fetches_verifies_and_scores_the_same(
    tmp_path: Path, redis_url: str
) -> None:
    queue = f"fetch{uuid.uuid4().hex[:6]}"
    with running_stack(tmp_path / "api", redis_url, queue, workers=1, settings={"worker_secret": SECRET}) as stack:
        ds = register(stack.client("steward"), diabetes_frame(), name="diabetes-fetched", target="target",
                      task="regression")
        usual = _run(stack, ds["id"], ["rmse", "r2"])
        stop_processes(stack.workers)  # from here on, only the worker without the shared disk runs jobs

        cache = tmp_path / "cache"
        cache.mkdir()
        env = {**stack.env, "SEALFOLD_DATA_DIR": str(cache), "SEALFOLD_DATA_SOURCE": "api",
               "SEALFOLD_API_URL": stack.url, "SEALFOLD_WORKER_SECRET": SECRET,
               "DATABASE_URL": stack.settings.effective_database_url}
        name = f"{queue}-fetching"
        proc = start_worker(env, name, stack.log_path)
        try:
            _wait_registered(redis_url, proc, name, stack.log_path)
            assert not list(cache.iterdir())  # the worker started on an empty data dir and wrote nothing there
            started = time.monotonic()
            fetched = _run(stack, ds["id"], ["rmse", "r2", "mae"])
            print(f"\nfirst submission on a cold cache: {time.monotonic() - started:.2f} s")
            assert _scores(fetched, ["rmse", "r2"]) == _scores(usual, ["rmse", "r2"])

            mine, theirs = dataset_paths(stack.settings, ds["id"]), dataset_paths(
                stack.settings.__class__.load({"data_dir": cache}, environ={}), ds["id"])
            for name_ in ("development", "numeric", "manifest"):
                assert _sha(getattr(theirs, name_)) == _sha(getattr(mine, name_))
            # The holdout job fetched the sealed file (it scored the holdout from it) and kept no copy of it.
            assert fetched["result"]["holdout"]["released"] is True
            sealed_dir = theirs.sealed_holdout.parent
            assert sealed_dir.is_dir() and stat.S_IMODE(os.stat(sealed_dir).st_mode) == 0o700
            # Its per-example holdout values went to the API, for a verdict that may run on another worker (this
            # one's verdict read them from there); the worker kept them nowhere, nor anything else sealed.
            kept = Path(str(mine.sealed_holdout.parent / "per_example" / f"{fetched['id']}.npz"))
            assert kept.is_file() and fetched["result"]["verdict"]["decision"] in ("pass", "fail", "inconclusive")
            assert not [p for p in sealed_dir.rglob("*") if p.is_file()], list(sealed_dir.rglob("*"))
            # A verdict on another fetching worker reads the API's copy, in memory (and none where the API has
            # none), writing nothing to its data dir.
            other = DataFetcher(stack.settings.__class__.load(
                {"data_dir": tmp_path / "other-cache", "data_source": "api", "api_url": stack.url,
                 "worker_secret": SECRET, "database_url": "sqlite:///unused"}, environ={}))
            assert other.per_example(ds["id"], fetched["id"]) == kept.read_bytes()
            assert other.per_example(ds["id"], "sub_none") is None
            assert not (tmp_path / "other-cache").exists()

            damaged = bytearray(theirs.numeric.read_bytes())
            damaged[-8:] = b"\xff" * 8  # the last row's last value, same size
            theirs.numeric.write_bytes(bytes(damaged))
            started = time.monotonic()
            again = _run(stack, ds["id"], ["r2", "rmse"])
            print(f"a submission with one damaged cached file: {time.monotonic() - started:.2f} s")
            assert _sha(theirs.numeric) == _sha(mine.numeric)
            assert _scores(again, ["rmse", "r2"]) == _scores(usual, ["rmse", "r2"])
        finally:
            stop_processes([proc])
