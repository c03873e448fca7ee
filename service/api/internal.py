"""The internal data endpoint: dataset files for workers that have no shared disk (``SEALFOLD_DATA_SOURCE=api``).

Not part of the public API (a plain Flask blueprint, so it is left out of the OpenAPI document) and
off unless ``SEALFOLD_WORKER_SECRET`` is set: then every request must carry ``Authorization: Bearer
<that secret>``. What it serves:

    GET /internal/v1/identity                          the deployment's data identity
    GET /internal/v1/datasets/<id>/manifest            name, size and sha256 of each development file
    GET /internal/v1/datasets/<id>/files/<name>        one development file's bytes (names: DEVELOPMENT_FILES)
    GET /internal/v1/datasets/<id>/sealed              the sealed holdout's bytes (sha256 in a header)
    PUT /internal/v1/datasets/<id>/per-example/<sub>   the holdout job's per-example values of a submission
    GET /internal/v1/datasets/<id>/per-example/<sub>   the same, for the verdict job (which may run elsewhere)

The sealed path is separate so that only the worker's holdout job ever asks for it; the secret is what
guards it, as the shared volume's permissions guard the file on a shared disk. Ids are checked by
``store.dataset_paths`` and file names come from a fixed list, so no request reaches outside a dataset.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import tempfile
import threading
from pathlib import Path

from flask import Blueprint, Flask, Response, request, send_file

from service.api import json_response, service_context
from service.errors import InputError, NotFound, Unauthenticated
from service.ops import data_identity
from service.records import submissions
from service.vault.fingerprint import file_sha256
from service.vault.store import DatasetPaths, dataset_paths, per_example_path

PREFIX = "/internal/v1"
SHA256_HEADER = "X-Sealfold-Sha256"
CHUNK_BYTES = 1024 * 1024

blp = Blueprint("internal", __name__, url_prefix=PREFIX)


def _development_files(paths: DatasetPaths) -> dict[str, Path]:
    """The development files a worker needs, by the name it asks for (the allow-list)."""
    return {p.name: p for p in (paths.development, paths.numeric, paths.manifest)}


DEVELOPMENT_FILES = ("development.parquet", "numeric.npy", "manifest.json")


class _Digests:
    """sha256 of files by (path, size, mtime): dataset files never change once written, so each is read once."""

    def __init__(self) -> None:
        self._known: dict[tuple[str, int, int], str] = {}
        self._lock = threading.Lock()

    def of(self, path: Path) -> tuple[int, str]:
        stat = path.stat()
        key = (str(path), stat.st_size, stat.st_mtime_ns)
        with self._lock:
            known = self._known.get(key)
        if known is None:
            known = file_sha256(path)
            with self._lock:
                self._known[key] = known
        return stat.st_size, known


_DIGESTS = _Digests()


@blp.before_request
def _require_worker_secret() -> None:
    secret = service_context().settings.worker_secret
    if not secret:
        raise NotFound("no such resource (the internal data endpoint is off: SEALFOLD_WORKER_SECRET is not set)")
    sent = request.headers.get("Authorization", "")
    if not hmac.compare_digest(sent.encode("utf-8", "replace"), f"Bearer {secret}".encode()):
        raise Unauthenticated("the internal data endpoint needs Authorization: Bearer <SEALFOLD_WORKER_SECRET>")


@blp.get("/identity")
def identity() -> Response:
    """The data identity in the records DB, which a fetching worker compares with its own reading of it."""
    return json_response({"data_identity": data_identity.recorded_identity(service_context().engine)})


def _existing(paths: DatasetPaths, ds_id: str) -> dict[str, Path]:
    files = _development_files(paths)
    if not all(p.is_file() for p in files.values()):
        raise NotFound(f"no dataset {ds_id!r}")
    return files


@blp.get("/datasets/<ds_id>/manifest")
def manifest(ds_id: str) -> Response:
    """Name, size and sha256 of each development file of ``ds_id``."""
    files = _existing(dataset_paths(service_context().settings, ds_id), ds_id)
    entries = []
    for name, path in files.items():
        size, sha = _DIGESTS.of(path)
        entries.append({"name": name, "size": size, "sha256": sha})
    return json_response({"dataset_id": ds_id, "files": entries})


@blp.get("/datasets/<ds_id>/files/<name>")
def development_file(ds_id: str, name: str) -> Response:
    """One development file's bytes, streamed; only names on the allow-list."""
    files = _existing(dataset_paths(service_context().settings, ds_id), ds_id)
    if name not in DEVELOPMENT_FILES:
        raise NotFound(f"no file {name!r} in dataset {ds_id!r}; files are: {', '.join(DEVELOPMENT_FILES)}")
    return _send(files[name])


@blp.get("/datasets/<ds_id>/sealed")
def sealed(ds_id: str) -> Response:
    """The sealed holdout's bytes, for the holdout job only (it checks the fingerprint before any use)."""
    path = dataset_paths(service_context().settings, ds_id).sealed_holdout
    if not path.is_file():
        raise NotFound(f"no dataset {ds_id!r}")
    return _send(path)


@blp.get("/datasets/<ds_id>/per-example/<sub_id>")
def per_example(ds_id: str, sub_id: str) -> Response:
    """A submission's per-example holdout values, as its holdout job sent them (404: none were kept)."""
    path = _per_example_path(ds_id, sub_id)
    if not path.is_file():
        raise NotFound(f"no per-example values kept for submission {sub_id!r}")
    return _send(path)


@blp.put("/datasets/<ds_id>/per-example/<sub_id>")
def keep_per_example(ds_id: str, sub_id: str) -> Response:
    """Keep the per-example holdout values a fetching worker's holdout job computed (0600, sealed directory).

    Written whole under a temporary name, checked against the sha256 header, then renamed into place.
    """
    path = _per_example_path(ds_id, sub_id)
    expected = request.headers.get(SHA256_HEADER, "")
    limit = service_context().settings.max_upload_bytes
    if request.content_length is None or request.content_length > limit:
        raise InputError(f"the body must declare its Content-Length, at most {limit} bytes")
    path.parent.mkdir(mode=0o700, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{sub_id}-", suffix=".partial", dir=path.parent)  # 0600
    try:
        digest = hashlib.sha256()
        with os.fdopen(handle, "wb") as out:
            while chunk := request.stream.read(CHUNK_BYTES):
                digest.update(chunk)
                out.write(chunk)
        if not hmac.compare_digest(digest.hexdigest().encode(), expected.encode("utf-8", "replace")):
            raise InputError(f"the body does not match its {SHA256_HEADER} header")
        os.replace(temporary, path)
    finally:
        Path(temporary).unlink(missing_ok=True)
    return Response(status=204)


def _per_example_path(ds_id: str, sub_id: str) -> Path:
    """The kept file of ``sub_id``, which must be a submission of dataset ``ds_id`` whose seal exists."""
    ctx = service_context()
    sub = submissions.get(ctx.engine, sub_id)
    paths = dataset_paths(ctx.settings, ds_id)
    if sub is None or sub["dataset_id"] != ds_id or not paths.sealed_holdout.is_file():
        raise NotFound(f"no submission {sub_id!r} of dataset {ds_id!r}")
    return per_example_path(ctx.settings, ds_id, sub_id)


def _send(path: Path) -> Response:
    _, sha = _DIGESTS.of(path)
    response = send_file(path, mimetype="application/octet-stream", conditional=False, max_age=0)
    response.headers[SHA256_HEADER] = sha
    response.headers["Cache-Control"] = "no-store"
    return response


def register_internal(app: Flask) -> None:
    """Add the internal data endpoint to ``app`` (outside the OpenAPI document)."""
    app.register_blueprint(blp)
