"""The internal data endpoint: off without a worker secret, refused without it, and never outside a dataset."""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest

from service.ops.data_identity import recorded_identity
from service.vault.store import dataset_paths
from tests.support.api import Api, open_api
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.worker_records import add_submission

SECRET = "internal-test-secret"
BEARER = {"Authorization": f"Bearer {SECRET}"}


def _with_secret(api: Api, secret: str) -> None:
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, settings=dataclasses.replace(ctx.settings,
                                                                                           worker_secret=secret))


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[Api, dict[str, Any]]]:
    with open_api(tmp_path) as api:
        reply = api.upload("steward", csv_bytes(diabetes_frame()), name="diabetes", target="target",
                           task="regression")
        assert reply.status_code == 201, reply.get_data(as_text=True)
        _with_secret(api, SECRET)
        yield api, reply.get_json()


def _problem(response: Any, status: int) -> dict[str, Any]:
    assert response.status_code == status, response.get_data(as_text=True)
    assert response.mimetype == "application/problem+json"
    return dict(response.get_json())


def test_the_endpoint_is_off_without_a_worker_secret(served: tuple[Api, dict[str, Any]]) -> None:
    api, ds = served
    _with_secret(api, "")
    for path in ("/internal/v1/identity", f"/internal/v1/datasets/{ds['id']}/manifest"):
        assert "SEALFOLD_WORKER_SECRET" in _problem(api.client.get(path, headers=BEARER), 404)["detail"]


@pytest.mark.parametrize("header", [None, "Bearer wrong", f"Bearer {SECRET}x", SECRET, "Basic abc"])
def test_a_missing_or_wrong_secret_is_refused(served: tuple[Api, dict[str, Any]], header: str | None) -> None:
    api, ds = served
    headers = {} if header is None else {"Authorization": header}
    for path in ("/internal/v1/identity", f"/internal/v1/datasets/{ds['id']}/manifest",
                 f"/internal/v1/datasets/{ds['id']}/files/development.parquet",
                 f"/internal/v1/datasets/{ds['id']}/sealed"):
        _problem(api.client.get(path, headers=headers), 401)


def test_the_manifest_names_each_development_file_with_its_size_and_sha256(
    served: tuple[Api, dict[str, Any]],
) -> None:
    api, ds = served
    reply = api.client.get(f"/internal/v1/datasets/{ds['id']}/manifest", headers=BEARER)
    assert reply.status_code == 200
    paths = dataset_paths(api.settings, ds["id"])
    files = {f["name"]: f for f in reply.get_json()["files"]}
    assert set(files) == {"development.parquet", "numeric.npy", "manifest.json"}
    for name, entry in files.items():
        data = (paths.root / name).read_bytes()
        assert entry["size"] == len(data)
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()
        served_bytes = api.client.get(f"/internal/v1/datasets/{ds['id']}/files/{name}", headers=BEARER)
        assert served_bytes.status_code == 200 and served_bytes.data == data
        assert served_bytes.headers["X-Sealfold-Sha256"] == entry["sha256"]
    sealed = api.client.get(f"/internal/v1/datasets/{ds['id']}/sealed", headers=BEARER)
    assert sealed.status_code == 200 and sealed.data == paths.sealed_holdout.read_bytes()
    identity = api.client.get("/internal/v1/identity", headers=BEARER).get_json()
    assert identity == {"data_identity": recorded_identity(api.engine)}


@pytest.mark.parametrize("tail", [
    "files/holdout.parquet", "files/.verified.json", "files/..%2F..%2Frecords.sqlite3", "files/folds",
    "files/..", "files/manifest.json%00",
])
def test_only_the_listed_development_files_are_served(served: tuple[Api, dict[str, Any]], tail: str) -> None:
    api, ds = served
    _problem(api.client.get(f"/internal/v1/datasets/{ds['id']}/{tail}", headers=BEARER), 404)


@pytest.mark.parametrize("ds_id", ["..", "..%2Fsealed", ".hidden", "ds%2F..%2F..", "no-such-dataset"])
def test_an_id_outside_the_datasets_is_not_found(served: tuple[Api, dict[str, Any]], ds_id: str) -> None:
    api, _ = served
    for tail in ("manifest", "files/development.parquet", "sealed"):
        response = api.client.get(f"/internal/v1/datasets/{ds_id}/{tail}", headers=BEARER)
        assert response.status_code == 404, (ds_id, tail)


def test_the_internal_endpoint_is_not_in_the_public_spec(served: tuple[Api, dict[str, Any]]) -> None:
    api, _ = served
    spec = api.client.get("/openapi.json").get_json()
    assert not [p for p in spec["paths"] if p.startswith("/internal")]


@pytest.mark.parametrize("sub_id", ["sub_none", "..", ".hidden", "sub%2F..%2F..%2Fx"])
def test_per_example_values_of_no_submission_are_not_found_nor_written(
    served: tuple[Api, dict[str, Any]], sub_id: str,
) -> None:
    api, ds = served
    path = f"/internal/v1/datasets/{ds['id']}/per-example/{sub_id}"
    assert api.client.get(path, headers=BEARER).status_code == 404
    body = b"values"
    put = api.client.put(path, data=body, headers={**BEARER, "X-Sealfold-Sha256": hashlib.sha256(body).hexdigest()})
    assert put.status_code == 404
    kept = dataset_paths(api.settings, ds["id"]).sealed_holdout.parent / "per_example"
    assert not kept.exists() or not list(kept.iterdir())


def test_writing_per_example_values_needs_the_secret(served: tuple[Api, dict[str, Any]]) -> None:
    api, ds = served
    _problem(api.client.put(f"/internal/v1/datasets/{ds['id']}/per-example/sub_none", data=b"x"), 401)


def test_per_example_values_are_kept_whole_and_checked(served: tuple[Api, dict[str, Any]]) -> None:
    api, ds = served
    sub_id = add_submission(SimpleNamespace(engine=api.engine), ds,  # type: ignore[arg-type]
                            {"validation": {"folds": 5, "repeats": 1}})
    path = f"/internal/v1/datasets/{ds['id']}/per-example/{sub_id}"
    assert api.client.get(path, headers=BEARER).status_code == 404  # none kept yet
    body = b"per-example values"
    for wrong in ("0" * 64, "\u00e9" * 64, ""):
        refused = api.client.put(path, data=body, headers={**BEARER, "X-Sealfold-Sha256": wrong})
        assert _problem(refused, 422)["detail"].startswith("the body does not match")
    kept = dataset_paths(api.settings, ds["id"]).sealed_holdout.parent / "per_example"
    assert not kept.exists() or not list(kept.iterdir())  # nothing half-written
    sha = hashlib.sha256(body).hexdigest()
    assert api.client.put(path, data=body, headers={**BEARER, "X-Sealfold-Sha256": sha}).status_code == 204
    assert [p.name for p in kept.iterdir()] == [f"{sub_id}.npz"]
    assert oct((kept / f"{sub_id}.npz").stat().st_mode & 0o777) == oct(0o600)
    served_back = api.client.get(path, headers=BEARER)
    assert served_back.status_code == 200 and served_back.data == body
    assert served_back.headers["X-Sealfold-Sha256"] == sha
    other = api.upload("steward", csv_bytes(diabetes_frame()), name="another", target="target", task="regression")
    assert api.client.get(f"/internal/v1/datasets/{other.get_json()['id']}/per-example/{sub_id}",
                          headers=BEARER).status_code == 404  # the submission is not that dataset's
