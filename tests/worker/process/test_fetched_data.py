"""A worker's cache of dataset files fetched from a real served API: verified, re-fetched when damaged, and
the sealed file only on the holdout job's request."""

from __future__ import annotations

import dataclasses
import hashlib
import os
import shutil
import stat
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from service.errors import SettingsError
from service.ops.data_identity import MARKER_NAME
from service.settings import Settings
from service.vault.store import dataset_paths
from tests.support.api import Api, open_api
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.records import upgraded_engine
from tests.support.servers import ServedApp
from worker.jobs import runtime
from worker.process.fetched_data import STALE_COPY_MARGIN_SECONDS, DataFetcher, FetchFailed

SECRET = "fetch-test-secret"
ROOT = Path(__file__).resolve().parents[3]


@pytest.fixture
def api_with_dataset(tmp_path: Path) -> Iterator[tuple[Api, str, str]]:
    """A served API (real HTTP) with a worker secret and one registered dataset: (api, url, dataset id)."""
    (tmp_path / "api").mkdir()
    with open_api(tmp_path / "api") as api:
        reply = api.upload("steward", csv_bytes(diabetes_frame()), name="diabetes", target="target",
                           task="regression")
        assert reply.status_code == 201, reply.get_data(as_text=True)
        ctx = api.app.extensions["sealfold"]
        api.app.extensions["sealfold"] = dataclasses.replace(
            ctx, settings=dataclasses.replace(ctx.settings, worker_secret=SECRET))
        with ServedApp(api.app) as served:
            yield api, served.url, reply.get_json()["id"]


def _fetcher(cache: Path, url: str, secret: str = SECRET, **more: Any) -> DataFetcher:
    return DataFetcher(Settings.load({"data_dir": cache, "data_source": "api", "api_url": url,
                                      "worker_secret": secret, "database_url": "sqlite:///unused", **more},
                                     environ={}))


def _same_bytes(a: Path, b: Path) -> bool:
    return hashlib.sha256(a.read_bytes()).digest() == hashlib.sha256(b.read_bytes()).digest()


def test_development_files_are_fetched_verified_and_kept(api_with_dataset: tuple[Api, str, str],
                                                         tmp_path: Path) -> None:
    api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url)
    assert sorted(fetcher.development(ds_id)) == ["development.parquet", "manifest.json", "numeric.npy"]
    mine, theirs = dataset_paths(fetcher.settings, ds_id), dataset_paths(api.settings, ds_id)
    for name in ("development", "numeric", "manifest"):
        assert _same_bytes(getattr(mine, name), getattr(theirs, name))
    assert fetcher.development(ds_id) == []  # warm: nothing fetched again
    # Fold jobs only: the sealed file is nowhere in the cache.
    assert not (tmp_path / "cache" / "sealed").exists()
    assert not [p for p in (tmp_path / "cache").rglob("*") if p.name == theirs.sealed_holdout.name]


def test_a_fetch_keeps_the_cache_under_its_cap_removing_datasets_no_job_may_still_read(
    api_with_dataset: tuple[Api, str, str], tmp_path: Path
) -> None:
    _api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url, data_cache_max_mb=1)
    datasets = tmp_path / "cache" / "datasets"
    idle = time.time() - fetcher.settings.longest_job_timeout_seconds - 2 * STALE_COPY_MARGIN_SECONDS
    for name, used in (("ds-idle", idle), ("ds-busy", time.time() - 60)):  # 1 MiB each, cached earlier
        (datasets / name).mkdir(parents=True)
        (datasets / name / "numeric.npy").write_bytes(b"\0" * (1 << 20))
        os.utime(datasets / name, (used, used))
    assert fetcher.development(ds_id)  # fetched: the cache is over its 1 MiB
    assert not (datasets / "ds-idle").exists()  # used longer ago than any job may run
    assert (datasets / "ds-busy").is_dir()  # a job that asked for it a minute ago may still read it
    assert _same_bytes(dataset_paths(fetcher.settings, ds_id).numeric,
                       dataset_paths(_api.settings, ds_id).numeric)
    # The settings say what the cap is, and 0 turns it off.
    assert Settings.load(environ={}).data_cache_max_mb == 10240
    assert Settings.load(environ={"SEALFOLD_DATA_CACHE_MAX_MB": "0"}).data_cache_max_mb == 0
    with pytest.raises(SettingsError, match="data_cache_max_mb must be 0"):
        Settings.load({"data_cache_max_mb": -1}, environ={})


def test_a_damaged_cached_file_is_fetched_again(api_with_dataset: tuple[Api, str, str], tmp_path: Path) -> None:
    api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url)
    fetcher.development(ds_id)
    mine, theirs = dataset_paths(fetcher.settings, ds_id), dataset_paths(api.settings, ds_id)
    data = bytearray(mine.numeric.read_bytes())
    data[-1] ^= 0xFF  # same size, one byte changed
    mine.numeric.write_bytes(bytes(data))
    mine.development.write_bytes(mine.development.read_bytes()[:-10])  # truncated
    assert sorted(fetcher.development(ds_id)) == ["development.parquet", "numeric.npy"]
    assert _same_bytes(mine.numeric, theirs.numeric) and _same_bytes(mine.development, theirs.development)


def test_the_sealed_file_is_fetched_only_on_request_and_kept_private(api_with_dataset: tuple[Api, str, str],
                                                                    tmp_path: Path) -> None:
    api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url)
    path = fetcher.sealed(ds_id)
    assert _same_bytes(path, dataset_paths(api.settings, ds_id).sealed_holdout)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(path.parent).st_mode) == 0o700
    assert stat.S_IMODE(os.stat(path.parent.parent).st_mode) == 0o700
    assert not [p for p in path.parent.iterdir() if p != path]  # no temporary file left behind
    # Each call gets a copy of its own, never the shared name: two holdout jobs on one data dir never share it.
    second = fetcher.sealed(ds_id)
    assert second != path and _same_bytes(second, path)
    assert path.name != dataset_paths(api.settings, ds_id).sealed_holdout.name
    assert not dataset_paths(fetcher.settings, ds_id).sealed_holdout.exists()


def test_the_holdout_jobs_copy_of_the_sealed_file_is_removed_however_the_job_ends(
    api_with_dataset: tuple[Api, str, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url)
    monkeypatch.setattr(runtime._Slot, "data_source", fetcher)
    folder = dataset_paths(fetcher.settings, ds_id).sealed_holdout.parent
    with runtime.sealed_file(ds_id) as fetched:
        assert fetched is not None and fetched.is_file()
    assert not fetched.exists() and not list(folder.iterdir())
    with pytest.raises(RuntimeError), runtime.sealed_file(ds_id) as fetched:
        assert fetched is not None and fetched.is_file()
        raise RuntimeError("the pipeline failed on the sealed rows")
    assert not list(folder.iterdir())
    monkeypatch.setattr(runtime._Slot, "data_source", None)
    with runtime.sealed_file(ds_id) as shared:
        assert shared is None  # a shared data dir: the job reads the store's own file, which stays


def test_a_copy_left_by_a_killed_job_is_removed_once_older_than_the_holdout_timeout(
    api_with_dataset: tuple[Api, str, str], tmp_path: Path
) -> None:
    _api, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url)
    left, reading = fetcher.sealed(ds_id), fetcher.sealed(ds_id)  # two copies no job removed
    past = time.time() - fetcher.settings.job_timeout_seconds("holdout") - 2 * STALE_COPY_MARGIN_SECONDS
    os.utime(left, (past, past))
    fresh = fetcher.sealed(ds_id)
    assert not left.exists()  # its job is over: it ended past the holdout timeout
    assert reading.exists() and fresh.exists()  # may still be read by a job under way


def test_a_wrong_secret_fetches_nothing(api_with_dataset: tuple[Api, str, str], tmp_path: Path) -> None:
    _, url, ds_id = api_with_dataset
    fetcher = _fetcher(tmp_path / "cache", url, secret="not-the-secret")
    with pytest.raises(FetchFailed, match="HTTP 401"):
        fetcher.development(ds_id)
    with pytest.raises(FetchFailed, match="HTTP 401"):
        fetcher.sealed(ds_id)
    assert not [p for p in (tmp_path / "cache").rglob("*") if p.is_file()]


def test_an_unknown_dataset_fails_as_unreadable_data(api_with_dataset: tuple[Api, str, str], tmp_path: Path) -> None:
    _, url, _ = api_with_dataset
    with pytest.raises(FetchFailed, match="HTTP 404") as raised:
        _fetcher(tmp_path / "cache", url).development("no-such-dataset")
    assert isinstance(raised.value, OSError)  # worker.jobs.failure retries it as data this worker could not read


@pytest.mark.parametrize("missing", ["api_url", "worker_secret", "database_url"])
def test_data_source_api_needs_its_settings(missing: str) -> None:
    values: dict[str, Any] = {"data_source": "api", "api_url": "http://127.0.0.1:1", "worker_secret": "s",
                              "database_url": "sqlite:///x"}
    values[missing] = ""
    with pytest.raises(SettingsError, match=missing):
        Settings.load(values, environ={})


def test_data_source_is_shared_or_api() -> None:
    assert Settings.load({}, environ={}).data_source == "shared"
    with pytest.raises(SettingsError, match="data_source"):
        Settings.load({"data_source": "s3"}, environ={})


def _start_fetching_worker(tmp_path: Path, url: str, database_url: str, redis_url: str,
                           secret: str = SECRET, data_dir: Path | None = None) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SEALFOLD_DATA_DIR": str(data_dir or tmp_path / "cache"), "SEALFOLD_DATA_SOURCE": "api",
           "SEALFOLD_API_URL": url, "SEALFOLD_WORKER_SECRET": secret, "DATABASE_URL": database_url,
           "REDIS_URL": redis_url, "SEALFOLD_QUEUE": f"q{uuid.uuid4().hex[:8]}"}
    return subprocess.run([sys.executable, "-m", "worker", "--burst"], env=env, cwd=ROOT, capture_output=True,
                          text=True, timeout=120)


def test_a_fetching_worker_refuses_another_deployments_api(api_with_dataset: tuple[Api, str, str],
                                                           tmp_path: Path, redis_url: str) -> None:
    _, url, _ = api_with_dataset
    other = Settings.load({"data_dir": tmp_path / "other", "database_url": ""}, environ={})
    upgraded_engine(other).dispose()  # a records DB with an identity of its own
    done = _start_fetching_worker(tmp_path, url, other.effective_database_url, redis_url)
    assert done.returncode == 3, done.stderr[-2000:]
    assert "serves another deployment's data" in done.stderr


def test_a_fetching_worker_with_a_wrong_secret_refuses_to_start(api_with_dataset: tuple[Api, str, str],
                                                                tmp_path: Path, redis_url: str) -> None:
    api, url, _ = api_with_dataset
    done = _start_fetching_worker(tmp_path, url, api.settings.effective_database_url, redis_url, secret="wrong")
    assert done.returncode == 3, done.stderr[-2000:]
    assert "cannot ask the API for its data identity" in done.stderr and "HTTP 401" in done.stderr
    assert not (tmp_path / "cache").exists() or not any((tmp_path / "cache").rglob("*.parquet"))


def test_a_fetching_worker_on_a_deployments_data_volume_refuses_to_start_and_prunes_nothing(
    api_with_dataset: tuple[Api, str, str], tmp_path: Path, redis_url: str
) -> None:
    api, url, ds_id = api_with_dataset
    volume = api.settings.data_dir  # carries the deployment's marker
    done = _start_fetching_worker(tmp_path, url, api.settings.effective_database_url, redis_url, data_dir=volume)
    assert done.returncode == 3, done.stderr[-2000:]
    assert "is a deployment's data directory" in done.stderr and "SEALFOLD_DATA_SOURCE=shared" in done.stderr
    # Even called directly, a fetch into a directory with a marker never prunes the datasets there.
    marked = tmp_path / "marked"
    idle = marked / "datasets" / "ds-idle"
    idle.mkdir(parents=True)
    (idle / "numeric.npy").write_bytes(b"\0" * (2 << 20))
    old = time.time() - 30 * 86_400
    os.utime(idle, (old, old))
    shutil.copy(volume / MARKER_NAME, marked / MARKER_NAME)
    assert _fetcher(marked, url, data_cache_max_mb=1).development(ds_id)
    assert idle.is_dir()
    (marked / MARKER_NAME).unlink()
    (marked / "datasets" / ds_id / "numeric.npy").unlink()
    assert _fetcher(marked, url, data_cache_max_mb=1).development(ds_id) == ["numeric.npy"]
    assert not idle.exists()  # the same fetch without the marker: a cache, pruned


def test_a_fetching_worker_starting_removes_sealed_rows_left_by_older_versions_and_killed_jobs(
    api_with_dataset: tuple[Api, str, str], tmp_path: Path, redis_url: str
) -> None:
    api, url, _ = api_with_dataset
    folder = tmp_path / "cache" / "sealed" / "ds_a"
    (folder / "per_example").mkdir(parents=True)
    legacy, killed = folder / "holdout.parquet", folder / "per_example" / "sub_old.npz"
    running, copy = folder / "per_example" / "sub_now.npz", folder / ".holdout-abc.parquet"
    for path in (legacy, killed, running, copy):
        path.write_bytes(b"sealed-derived bytes")
    past = time.time() - Settings.load(environ={}).job_timeout_seconds("holdout") - 2 * STALE_COPY_MARGIN_SECONDS
    os.utime(killed, (past, past))
    done = _start_fetching_worker(tmp_path, url, api.settings.effective_database_url, redis_url)
    assert done.returncode == 0, done.stderr[-2000:]
    assert not legacy.exists()  # the whole sealed file an older version kept, however young
    assert not killed.exists()  # values of a job killed longer ago than the holdout timeout
    assert running.exists() and copy.exists()  # may belong to another worker's holdout job under way


class _Publisher:
    """A data source whose publishing succeeds, or fails as an unreachable API would."""

    def __init__(self, fails: bool) -> None:
        self.fails, self.sent = fails, []

    def publish_per_example(self, ds_id: str, submission_id: str, path: Path) -> None:
        if self.fails:
            raise FetchFailed("the API did not answer")
        self.sent.append(path.read_bytes())


@pytest.mark.parametrize("fails", [False, True], ids=["published", "publishing failed"])
def test_per_example_values_leave_no_copy_on_a_fetching_worker(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fails: bool
) -> None:
    written = tmp_path / "sealed" / "ds_x" / "per_example" / "sub_x.npz"
    written.parent.mkdir(parents=True)
    written.write_bytes(b"per-example values")
    publisher = _Publisher(fails)
    monkeypatch.setattr(runtime._Slot, "data_source", publisher)
    if fails:
        with pytest.raises(FetchFailed):  # the holdout job gets the error, as before
            runtime.publish_per_example("ds_x", "sub_x", written)
    else:
        runtime.publish_per_example("ds_x", "sub_x", written)
        assert publisher.sent == [b"per-example values"]
    assert not written.exists()
    monkeypatch.setattr(runtime._Slot, "data_source", None)
    written.write_bytes(b"per-example values")
    runtime.publish_per_example("ds_x", "sub_x", written)  # a shared data dir: the file is the one kept
    assert written.exists() and runtime.per_example_source("ds_x", "sub_x", written) == written
