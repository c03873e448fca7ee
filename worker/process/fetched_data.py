"""A worker's local cache of dataset files fetched from the API (``SEALFOLD_DATA_SOURCE=api``).

With no shared disk, the worker's ``SEALFOLD_DATA_DIR`` is its own cache, laid out as
``service.vault.store`` lays out the shared volume, so every job reads files the usual way. Before a job
opens a dataset, ``DataFetcher.development`` makes sure its development files are there: it asks the
API's internal endpoint (``service.api.internal``) for the manifest, keeps each cached file whose size
and recorded sha256 match it, and fetches the others into a temporary name, checks the sha256 of the
bytes received and renames them into place. A file whose size or modification time changed since it was
checked is hashed again before it is trusted. The sealed holdout is fetched only by the holdout job
(``DataFetcher.sealed``), into a file of that job's own, 0600 in a 0700 ``sealed/`` directory; the job's
fingerprint check still runs on it, and the job removes it once read (``runtime.sealed_file``), so the
worker keeps no copy of the sealed rows. A copy left by a work horse killed before it removed its own is
removed by the next fetch of that dataset's sealed file, once older than the holdout job's timeout, and a
worker starting removes what older versions or killed jobs left under ``sealed/`` (``sweep_sealed``). The
per-example holdout values the holdout job keeps are sent to the API (``publish_per_example``) and removed
here, and jobs that read them read the API's copy into memory (``per_example``), so the verdict may run on
another worker and no worker keeps them. After a fetch, the datasets used longest ago are removed until the
cache is back under ``SEALFOLD_DATA_CACHE_MAX_MB`` (``worker.process.cache_prune``).
"""

from __future__ import annotations

import contextlib
import hashlib
import http.client
import io
import json
import os
import tempfile
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Iterable
from pathlib import Path
from typing import Any, BinaryIO

from service.ops.data_identity import read_marker
from service.settings import Settings
from service.vault.fingerprint import file_sha256
from service.vault.store import dataset_paths
from worker.process.cache_prune import mark_used, prune

INTERNAL_PREFIX = "/internal/v1"  # service.api.internal.PREFIX (the worker does not import Flask code)
SHA256_HEADER = "X-Sealfold-Sha256"
RECORD_NAME = ".verified.json"
SEALED_COPY_PREFIX = ".holdout-"  # a holdout job's own copy of the sealed file (DataFetcher.sealed)
LEGACY_SEALED_NAME = "holdout.parquet"  # the store's name of the sealed file, where older versions kept a copy
STALE_COPY_MARGIN_SECONDS = 60.0
CHUNK_BYTES = 1024 * 1024
TIMEOUT_SECONDS = 60.0


class FetchFailed(OSError):
    """The API did not give a file whole (unreachable, refused, or bytes that do not match their sha256).

    An ``OSError``, so a job it stops is retried as data this worker could not read
    (``worker.jobs.failure``).
    """


class _Absent(FetchFailed):
    """The API has no such per-example file (no holdout values were kept for the submission)."""


def _private_dirs(data_dir: Path, folder: Path) -> None:
    """Make every directory from ``data_dir/sealed`` down to ``folder`` exist, each 0700."""
    sealed_root = data_dir / "sealed"
    chain = [folder, *[p for p in folder.parents if p.is_relative_to(sealed_root)]]
    for each in reversed(chain):
        each.mkdir(mode=0o700, parents=True, exist_ok=True)
        os.chmod(each, 0o700)


class DataFetcher:
    """Fetches and verifies dataset files from ``settings.api_url`` into ``settings.data_dir``."""

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.base = settings.api_url.rstrip("/") + INTERNAL_PREFIX

    def _open(self, path: str, *, data: bytes | None = None, headers: dict[str, str] | None = None) -> Any:
        all_headers = {"Authorization": f"Bearer {self.settings.worker_secret}", "Accept": "*/*", **(headers or {})}
        req = urllib.request.Request(self.base + path, data=data, headers=all_headers,
                                     method="GET" if data is None else "PUT")
        try:
            return urllib.request.urlopen(req, timeout=TIMEOUT_SECONDS)
        except urllib.error.HTTPError as err:
            with err:
                cls = _Absent if err.code == 404 and "/per-example/" in path else FetchFailed
                raise cls(f"the API refused {INTERNAL_PREFIX}{path}: HTTP {err.code}") from None
        except (OSError, ValueError) as exc:
            raise FetchFailed(f"cannot fetch {INTERNAL_PREFIX}{path} from {self.settings.api_url}: {exc}") from exc

    def _json(self, path: str) -> Any:
        with self._open(path) as resp:
            try:
                return json.loads(resp.read())
            except (ValueError, http.client.HTTPException) as exc:
                raise FetchFailed(f"{INTERNAL_PREFIX}{path} did not answer whole JSON: {exc!r}") from exc

    def identity(self) -> str | None:
        """The data identity the API reports (its records DB's); raises FetchFailed when it cannot be asked."""
        value = self._json("/identity").get("data_identity")
        return value if isinstance(value, str) else None

    def development(self, ds_id: str) -> list[str]:
        """Make the development files of ``ds_id`` present and verified; return the names fetched now."""
        paths = dataset_paths(self.settings, ds_id)  # refuses an id that is not one path component
        quoted = urllib.parse.quote(ds_id, safe="")
        listing = self._json(f"/datasets/{quoted}/manifest")
        mark_used(paths.root.parent, ds_id)  # before any file is checked: a prune meanwhile leaves it alone
        record_path = paths.root / RECORD_NAME
        record = _read_record(record_path)
        fetched = []
        for entry in listing.get("files", []):
            name, size, sha = str(entry["name"]), int(entry["size"]), str(entry["sha256"])
            if name not in {paths.development.name, paths.numeric.name, paths.manifest.name}:
                raise FetchFailed(f"the API's manifest of dataset {ds_id!r} names an unexpected file {name!r}")
            target = paths.root / name
            if _verified(target, record.get(name), size, sha):
                record[name] = _stamp(target, sha)
                continue
            self._download(f"/datasets/{quoted}/files/{name}", target, sha, mode=0o644)
            fetched.append(name)
            record[name] = _stamp(target, sha)
        _write_record(record_path, record)
        # Never on a deployment's data volume (it carries the marker; the data check refuses that anyway).
        if fetched and self.settings.data_cache_max_mb and read_marker(self.settings.data_dir) is None:
            prune(paths.root.parent, ds_id, self.settings.data_cache_max_mb << 20,
                  self.settings.longest_job_timeout_seconds + STALE_COPY_MARGIN_SECONDS, time.time())
        return fetched

    def sealed(self, ds_id: str) -> Path:
        """Fetch the sealed holdout of ``ds_id`` into a new file of the caller's own (0600 in a 0700 directory)
        and return its path; the caller reads it once and removes it.

        Fetched on every call, never under a shared name: two holdout jobs on one data dir each read their
        own copy, so one removing its copy never takes the file from the other. The fingerprint is checked
        by the caller (``store.open_sealed_holdout``).
        """
        folder = dataset_paths(self.settings, ds_id).sealed_holdout.parent
        _private_dirs(self.settings.data_dir, folder)
        self._remove_left(folder.glob(f"{SEALED_COPY_PREFIX}*"))  # copies of killed work horses, once stale
        handle, name = tempfile.mkstemp(prefix=SEALED_COPY_PREFIX, suffix=".parquet", dir=folder)  # mode 0600
        try:
            with os.fdopen(handle, "wb") as out:
                self._receive(f"/datasets/{urllib.parse.quote(ds_id, safe='')}/sealed", None, out)
        except BaseException:
            Path(name).unlink(missing_ok=True)
            raise
        return Path(name)

    def sweep_sealed(self) -> list[Path]:
        """Remove what is left under this cache's ``sealed/``: the whole sealed file older versions kept as
        ``holdout.parquet`` (no job writes that name here now), and any other file left by a job killed before
        it removed it (``_remove_left``). Return the files removed. Run at start, after the data check has
        made sure the data dir is this worker's cache, not a deployment's volume."""
        return self._remove_left((self.settings.data_dir / "sealed").rglob("*"), legacy=True)

    def _remove_left(self, files: Iterable[Path], *, legacy: bool = False) -> list[Path]:
        """Remove those of ``files`` older than the holdout job's timeout (their job is over; a younger one may
        be another job's under way) and, with ``legacy``, every ``LEGACY_SEALED_NAME``; return them."""
        oldest = time.time() - self.settings.job_timeout_seconds("holdout") - STALE_COPY_MARGIN_SECONDS
        removed = []
        for left in files:
            with contextlib.suppress(OSError):
                if left.is_file() and ((legacy and left.name == LEGACY_SEALED_NAME) or left.stat().st_mtime < oldest):
                    left.unlink()
                    removed.append(left)
        return removed

    def per_example(self, ds_id: str, submission_id: str) -> bytes | None:
        """Return the API's copy of a submission's per-example holdout values (its sha256 checked), or None
        when the API has none: the API's copy is the one written before the stored score. Read into memory,
        never written here: the worker keeps no values derived from the sealed rows."""
        received = io.BytesIO()
        try:
            self._receive(self._per_example_url(ds_id, submission_id), None, received)
        except _Absent:
            return None
        return received.getvalue()

    def publish_per_example(self, ds_id: str, submission_id: str, path: Path) -> None:
        """Send the per-example values the holdout job just wrote to the API (the verdict may run elsewhere)."""
        data = path.read_bytes()
        url = self._per_example_url(ds_id, submission_id)
        with self._open(url, data=data, headers={SHA256_HEADER: hashlib.sha256(data).hexdigest(),
                                                 "Content-Type": "application/octet-stream"}):
            pass

    @staticmethod
    def _per_example_url(ds_id: str, submission_id: str) -> str:
        return (f"/datasets/{urllib.parse.quote(ds_id, safe='')}/per-example/"
                f"{urllib.parse.quote(submission_id, safe='')}")

    def _receive(self, path: str, sha: str | None, out: BinaryIO) -> None:
        """Stream ``path`` into ``out``; raise FetchFailed unless the bytes match ``sha`` (else the API's header)."""
        digest = hashlib.sha256()
        with self._open(path) as resp:
            expected = sha or resp.headers.get(SHA256_HEADER)
            try:
                while chunk := resp.read(CHUNK_BYTES):
                    digest.update(chunk)
                    out.write(chunk)
            except http.client.HTTPException as exc:  # a connection cut mid-body (IncompleteRead)
                raise FetchFailed(f"{INTERNAL_PREFIX}{path}: the transfer broke off: {exc!r}") from exc
        if not expected or digest.hexdigest() != expected:
            raise FetchFailed(f"{INTERNAL_PREFIX}{path}: the bytes received do not match their sha256")

    def _download(self, path: str, target: Path, sha: str, *, mode: int) -> None:
        """Stream ``path`` into a temporary file beside ``target``, check its sha256, rename it into place."""
        handle, temporary = tempfile.mkstemp(prefix=f".{target.name}-", dir=target.parent)  # mode 0600
        try:
            with os.fdopen(handle, "wb") as out:
                self._receive(path, sha, out)
            os.chmod(temporary, mode)
            os.replace(temporary, target)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise


def _stamp(path: Path, sha: str) -> dict[str, Any]:
    stat = path.stat()
    return {"size": stat.st_size, "mtime_ns": stat.st_mtime_ns, "sha256": sha}


def _verified(path: Path, recorded: Any, size: int, sha: str) -> bool:
    """Whether the cached ``path`` holds the bytes with ``sha``: its record says so and the file is unchanged
    since (size and modification time), or, when it changed or has no record, hashing it says so."""
    try:
        stat = path.stat()
    except OSError:
        return False
    if stat.st_size != size:
        return False
    if (isinstance(recorded, dict) and recorded.get("sha256") == sha and recorded.get("size") == size
            and recorded.get("mtime_ns") == stat.st_mtime_ns):
        return True
    return file_sha256(path) == sha


def _read_record(path: Path) -> dict[str, Any]:
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return record if isinstance(record, dict) else {}


def _write_record(path: Path, record: dict[str, Any]) -> None:
    handle, temporary = tempfile.mkstemp(prefix=".record-", dir=path.parent)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            json.dump(record, out)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
