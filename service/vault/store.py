"""Dataset files under the data dir: the development partition, and the sealed holdout.

Layout (``settings.data_dir``):
    datasets/<ds_id>/development.parquet  development rows, ``row_id`` first, then the original columns
    datasets/<ds_id>/numeric.npy          float64 C-order matrix of the numeric columns, for mmap
    datasets/<ds_id>/manifest.json        column kinds, numeric column names, target, task, and
                                          which numeric columns are finite in every row
    datasets/<ds_id>/folds/<scheme>-<k>-<seed>.npy  a fold plan's fold of every row (int8), cached
                                          at registration or by the first job that computes it;
                                          <scheme>.v<N>-<k>-<seed>.npy from version 2 of a scheme's
                                          algorithm (``ASSIGNMENT_VERSIONS``), so a changed
                                          algorithm never reads an older cache
    sealed/<ds_id>/holdout.parquet        holdout rows; directories 0700, file 0600
    secrets/fingerprint.key               the key of the published fingerprints' holdout HMAC (0700, 0600)

Both directories are first written under a temporary name beside their final place and then
renamed, so a reader sees a dataset completely or not at all. Only the worker's holdout job may
call ``open_sealed_holdout``, and it checks the fingerprint on every call.
"""

from __future__ import annotations

import hmac
import json
import os
import re
import secrets
import shutil
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.errors import Conflict, FieldProblem, InputError, NotFound, SealBroken
from service.settings import Settings
from service.vault.fingerprint import fingerprint_frame
from service.vault.folds import ASSIGNMENT_VERSIONS, FoldPlan

ROW_ID = "row_id"
FINITE_COLUMNS = "finite_columns"  # manifest key; a manifest written before it knew none finite
_SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,79}$")


@dataclass(frozen=True)
class DatasetPaths:
    """Where one dataset's files live."""

    root: Path
    development: Path
    numeric: Path
    manifest: Path
    sealed_holdout: Path


def dataset_paths(settings: Settings, ds_id: str) -> DatasetPaths:
    """Return the file locations of dataset ``ds_id`` (whether or not they exist)."""
    if not _SAFE_ID.match(ds_id):
        # An id is a single path component; anything else could walk out of the data dir.
        raise NotFound(f"no dataset {ds_id!r}")
    root = settings.data_dir / "datasets" / ds_id
    return DatasetPaths(
        root=root,
        development=root / "development.parquet",
        numeric=root / "numeric.npy",
        manifest=root / "manifest.json",
        sealed_holdout=settings.data_dir / "sealed" / ds_id / "holdout.parquet",
    )


def per_example_path(settings: Settings, ds_id: str, submission_id: str) -> Path:
    """Where the holdout job keeps a submission's per-example holdout values (inside the sealed directory)."""
    if not _SAFE_ID.match(submission_id):
        raise NotFound(f"no submission {submission_id!r}")
    return dataset_paths(settings, ds_id).sealed_holdout.parent / "per_example" / f"{submission_id}.npz"


def write_dataset(
    settings: Settings,
    ds_id: str,
    dev_df_with_row_id: pd.DataFrame,
    holdout_df: pd.DataFrame,
    manifest: dict[str, Any],
) -> DatasetPaths:
    """Write the development files and the sealed holdout, each directory appearing atomically."""
    paths = dataset_paths(settings, ds_id)
    sealed_dir = paths.sealed_holdout.parent
    if paths.root.exists() or sealed_dir.exists():
        raise Conflict(f"dataset {ds_id!r} already has files")
    if list(dev_df_with_row_id.columns[:1]) != [ROW_ID]:
        raise InputError(f"the development frame must start with {ROW_ID!r}")
    settings.data_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
    paths.root.parent.mkdir(parents=True, exist_ok=True)
    sealed_dir.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
    os.chmod(sealed_dir.parent, 0o700)
    try:
        staging = Path(tempfile.mkdtemp(prefix=f".{ds_id}-", dir=paths.root.parent))
        os.chmod(staging, 0o755)
        _write_parquet(dev_df_with_row_id, staging / paths.development.name)
        numeric_columns = list(manifest["numeric_columns"])
        matrix = numeric_matrix(dev_df_with_row_id, numeric_columns)
        np.save(staging / paths.numeric.name, matrix)
        manifest = {**manifest, FINITE_COLUMNS: finite_columns(matrix, numeric_columns)}
        del matrix
        (staging / paths.manifest.name).write_text(json.dumps(manifest, indent=2), encoding="utf-8")

        sealing = Path(tempfile.mkdtemp(prefix=f".{ds_id}-", dir=sealed_dir.parent))  # mode 0700
        os.chmod(sealing, 0o700)
        sealed_file = sealing / paths.sealed_holdout.name
        sealed_file.touch(mode=0o600)
        os.chmod(sealed_file, 0o600)
        _write_parquet(holdout_df, sealed_file)

        os.rename(sealing, sealed_dir)
        os.rename(staging, paths.root)
    except BaseException:
        remove_dataset(settings, ds_id)
        raise
    return paths


def remove_dataset(settings: Settings, ds_id: str) -> None:
    """Remove every file of ``ds_id``, including half-written staging directories."""
    paths = dataset_paths(settings, ds_id)
    for final in (paths.root, paths.sealed_holdout.parent):
        shutil.rmtree(final, ignore_errors=True)
        if final.parent.is_dir():
            for staging in final.parent.glob(f".{ds_id}-*"):
                shutil.rmtree(staging, ignore_errors=True)


def numeric_matrix(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """Return the named columns as one float64 C-order matrix (bool as 0/1, missing as NaN)."""
    matrix = np.empty((len(frame), len(columns)), dtype=np.float64)
    for position, name in enumerate(columns):
        matrix[:, position] = frame[name].to_numpy(dtype=np.float64, na_value=np.nan)
    return matrix


def finite_columns(matrix: np.ndarray, columns: list[str]) -> list[str]:
    """Return the columns of ``matrix`` whose every value is finite (no missing value, no infinity)."""
    finite = np.isfinite(matrix).all(axis=0) if len(matrix) else np.ones(len(columns), dtype=bool)
    return [name for name, ok in zip(columns, finite, strict=True) if ok]


def load_development_frame(settings: Settings, ds_id: str, columns: list[str] | None = None) -> pd.DataFrame:
    """Read the development partition, or only ``columns`` of it, in stored row order."""
    path = dataset_paths(settings, ds_id).development
    if not path.is_file():
        raise NotFound(f"no development partition for dataset {ds_id!r}")
    if columns is not None:
        known = pq.read_schema(path).names
        unknown = [c for c in columns if c not in known]
        if unknown:
            detail = (
                f"unknown column(s) {', '.join(repr(c) for c in unknown)} in dataset {ds_id!r}; "
                f"columns are: {', '.join(repr(c) for c in known)}"
            )
            raise InputError(detail, [FieldProblem("/columns", detail)])
    frame: pd.DataFrame = pq.read_table(path, columns=columns).to_pandas()
    return frame


@dataclass(frozen=True)
class NumericMatrix:
    """The memory-mapped numeric matrix of a dataset's development rows, with what its manifest says of it."""

    matrix: np.memmap[Any, Any]
    columns: list[str]
    finite: frozenset[str]  # the columns finite in every row, as the registration found them


def load_numeric(settings: Settings, ds_id: str) -> NumericMatrix:
    """Memory-map the numeric matrix of the development rows; name its columns and the finite ones."""
    paths = dataset_paths(settings, ds_id)
    if not paths.numeric.is_file():
        raise NotFound(f"no numeric matrix for dataset {ds_id!r}")
    manifest = json.loads(paths.manifest.read_text(encoding="utf-8"))
    matrix = np.load(paths.numeric, mmap_mode="r")
    return NumericMatrix(matrix, list(manifest["numeric_columns"]), frozenset(manifest.get(FINITE_COLUMNS, ())))


def fold_assignment_path(settings: Settings, ds_id: str, plan: FoldPlan, repeat: int) -> Path:
    """Return where the fold assignment of ``plan``'s repeat ``repeat`` (seed + repeat) is cached.

    The name carries the version of the scheme's algorithm from version 2 on; version 1 keeps the
    original name, so caches that are still right stay in use.
    """
    version = ASSIGNMENT_VERSIONS[plan.scheme]
    scheme = plan.scheme if version == 1 else f"{plan.scheme}.v{version}"
    return dataset_paths(settings, ds_id).root / "folds" / f"{scheme}-{plan.folds}-{plan.seed + repeat}.npy"


def load_fold_assignment(
    settings: Settings, ds_id: str, plan: FoldPlan, repeat: int, n_rows: int
) -> np.ndarray | None:
    """Return the cached fold of every development row, or None when there is no usable cache.

    A file of the wrong type, length or fold range is ignored (and recomputed by the caller), so a
    damaged cache can cost time but never change a fold.
    """
    path = fold_assignment_path(settings, ds_id, plan, repeat)
    try:
        assignment = np.load(path, allow_pickle=False)
    except (OSError, ValueError):
        return None
    highest = plan.folds if plan.scheme == "time" else plan.folds - 1  # time chunk 0 is train-only
    if assignment.dtype != np.int8 or assignment.shape != (n_rows,):
        return None
    if n_rows and not (int(assignment.min()) >= 0 and int(assignment.max()) <= highest):
        return None
    return assignment


def save_fold_assignment(settings: Settings, ds_id: str, plan: FoldPlan, repeat: int, assignment: np.ndarray) -> None:
    """Cache a fold assignment (write to a temporary name, then rename: readers see all or nothing)."""
    path = fold_assignment_path(settings, ds_id, plan, repeat)
    path.parent.mkdir(exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=".", suffix=".npy", dir=path.parent)
    try:
        with os.fdopen(handle, "wb") as out:
            np.save(out, np.asarray(assignment, dtype=np.int8), allow_pickle=False)
        os.chmod(temporary, 0o644)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def iter_development_csv(settings: Settings, ds_id: str, chunk_rows: int = 50_000) -> Iterator[str]:
    """Yield the development partition as CSV text: the header with the first chunk, then more rows."""
    path = dataset_paths(settings, ds_id).development
    if not path.is_file():
        raise NotFound(f"no development partition for dataset {ds_id!r}")
    parquet = pq.ParquetFile(path)
    header_sent = False
    for batch in parquet.iter_batches(batch_size=chunk_rows):
        yield batch.to_pandas().to_csv(index=False, header=not header_sent, lineterminator="\n")
        header_sent = True
    if not header_sent:
        yield parquet.schema_arrow.empty_table().to_pandas().to_csv(index=False, lineterminator="\n")


def open_sealed_holdout(
    settings: Settings, ds_id: str, expected_fingerprint: str, path: Path | None = None
) -> pd.DataFrame:
    """Read the sealed holdout, refusing it unless it matches ``expected_fingerprint``.

    ``path``: a copy of the sealed file to read instead of the data dir's (a worker without the shared
    disk reads the copy it fetched for the job); the fingerprint decides all the same.
    """
    path = dataset_paths(settings, ds_id).sealed_holdout if path is None else path
    try:
        frame: pd.DataFrame = pq.read_table(path).to_pandas()
    except (OSError, pa.ArrowException) as exc:
        # The message names neither the rows nor the file's content: only that the seal failed.
        raise SealBroken(f"the sealed holdout of dataset {ds_id!r} cannot be read") from exc
    actual = fingerprint_frame(frame)
    if not hmac.compare_digest(actual.encode("ascii"), expected_fingerprint.encode("ascii", "replace")):
        raise SealBroken(f"the sealed holdout of dataset {ds_id!r} does not match its fingerprint")
    return frame


def fingerprint_key(settings: Settings) -> bytes:
    """Return the server's key for published fingerprints, creating it (0600, in a 0700 directory) once.

    The key is written whole under a temporary name and linked to its final name, which fails when
    another process made it first; then that process's key is read, so every registration uses one key.
    """
    folder = settings.data_dir / "secrets"
    path = folder / "fingerprint.key"
    if not path.is_file():
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        os.chmod(folder, 0o700)
        handle, temporary = tempfile.mkstemp(prefix=".key-", dir=folder)  # mode 0600
        try:
            with os.fdopen(handle, "wb") as out:
                out.write(secrets.token_bytes(32))
            os.link(temporary, path)
        except FileExistsError:
            pass
        finally:
            Path(temporary).unlink(missing_ok=True)
    key = path.read_bytes()
    if len(key) != 32:
        raise SealBroken("the server's fingerprint key is damaged")
    return key


def _write_parquet(frame: pd.DataFrame, path: Path) -> None:
    table = pa.Table.from_pandas(frame, preserve_index=False)
    pq.write_table(table, path)
