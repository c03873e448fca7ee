"""Benchmark: what a worker without the shared disk pays to bring a dataset's files from the API.

A real API (create_app, served by waitress on a free port, SQLite records) with a worker secret; datasets
registered through the core: scikit-learn's diabetes table, and a larger invented-free table made by
scikit-learn's make_regression. For each, a fresh cache directory and ``worker.process.fetched_data.DataFetcher``
time: the first job's preparation (cold cache: manifest, fetch, sha256 check, rename), a later job's (warm:
the manifest only), the one after a cached file was damaged (that file fetched again), and the holdout job's
sealed fetch. Printed in milliseconds (median of ``--repeats`` runs). It asserts nothing.

Run: ``python -m bench.fetched_data`` (``--rows 200000`` for the larger table).
"""

from __future__ import annotations

import argparse
import io
import statistics
import tempfile
import threading
import time
from pathlib import Path

import pandas as pd
from sklearn.datasets import load_diabetes, make_regression
from waitress.server import create_server

from service.app import create_app
from service.ops.data_identity import claim
from service.records.engine import make_engine
from service.records.keys import create_key
from service.records.schema import upgrade
from service.settings import Settings
from service.vault.registration import DatasetDeclaration, register_dataset
from service.vault.store import dataset_paths
from worker.process.fetched_data import DataFetcher

SECRET = "bench-secret"


def _ms(seconds: float) -> str:
    return f"{seconds * 1000:8.1f}"


def _table(rows: int) -> pd.DataFrame:
    x, y = make_regression(n_samples=rows, n_features=20, noise=1.0, random_state=0)
    frame = pd.DataFrame(x, columns=[f"x{i}" for i in range(20)])
    frame["y"] = y
    return frame


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="sealfold-bench-fetch-") as tmp:
        root = Path(tmp)
        overrides = {"data_dir": root / "api", "database_url": "", "worker_secret": SECRET,
                     "redis_url": "redis://127.0.0.1:1/0"}
        settings = Settings.load(overrides, environ={})
        engine = make_engine(settings)
        upgrade(engine)
        claim(engine, settings.data_dir)
        actor = create_key(engine, "fleet", "steward", "bench")[0]
        tables = {"diabetes": (load_diabetes(as_frame=True).frame, "target"),
                  f"regression-{args.rows}": (_table(args.rows), "y")}
        ids = {}
        for name, (frame, target) in tables.items():
            buffer = io.BytesIO()
            frame.to_csv(buffer, index=False)
            record = register_dataset(settings, engine, actor, buffer.getvalue(), "csv",
                                      DatasetDeclaration(name=name, target=target, task="regression"))
            ids[name] = record["id"]
        app = create_app(overrides)
        server = create_server(app, host="127.0.0.1", port=0, threads=4)
        threading.Thread(target=server.run, daemon=True).start()
        url = f"http://127.0.0.1:{server.effective_port}"
        print(f"{'dataset':24} {'bytes':>12} {'cold ms':>8} {'warm ms':>8} {'damaged':>8} {'sealed':>8}")
        for name, ds_id in ids.items():
            paths = dataset_paths(settings, ds_id)
            size = sum(p.stat().st_size for p in (paths.development, paths.numeric, paths.manifest))
            cold, warm, damaged, sealed = [], [], [], []
            for run in range(args.repeats):
                cache = root / f"cache-{name}-{run}"
                fetcher = DataFetcher(Settings.load({"data_dir": cache, "data_source": "api", "api_url": url,
                                                     "worker_secret": SECRET, "database_url": "sqlite:///x"},
                                                    environ={}))
                started = time.perf_counter()
                fetcher.development(ds_id)
                cold.append(time.perf_counter() - started)
                started = time.perf_counter()
                fetcher.development(ds_id)
                warm.append(time.perf_counter() - started)
                numeric = dataset_paths(fetcher.settings, ds_id).numeric
                data = bytearray(numeric.read_bytes())
                data[-1] ^= 0xFF
                numeric.write_bytes(bytes(data))
                started = time.perf_counter()
                fetcher.development(ds_id)
                damaged.append(time.perf_counter() - started)
                started = time.perf_counter()
                fetcher.sealed(ds_id)
                sealed.append(time.perf_counter() - started)
            print(f"{name:24} {size:12d} {_ms(statistics.median(cold))} {_ms(statistics.median(warm))} "
                  f"{_ms(statistics.median(damaged))} {_ms(statistics.median(sealed))}")
        server.close()
        engine.dispose()


if __name__ == "__main__":
    main()
