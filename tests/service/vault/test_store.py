"""Dataset files: layout, permissions of the seal, streaming the development rows, the checked seal."""

from __future__ import annotations

import io
import json
import os
import stat
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service.errors import Conflict, InputError, NotFound, SealBroken
from service.settings import Settings
from service.vault import store
from service.vault.fingerprint import fingerprint_frame
from service.vault.tables import column_kinds
from tests.support.frames import diabetes_frame

DS = "ds_0123456789abcdef0123"


@pytest.fixture
def settings(tmp_path: Path) -> Settings:
    return Settings.load({"data_dir": tmp_path / "data"})


def _parts() -> tuple[pd.DataFrame, pd.DataFrame, dict[str, Any]]:
    frame = diabetes_frame()
    frame["depot"] = np.where(frame["sex"] > 0, "Northgate", "Windmere")
    frame["refrigerated"] = frame["age"] > 0
    holdout = frame.iloc[400:].reset_index(drop=True)
    development = frame.iloc[:400].reset_index(drop=True)
    development.insert(0, "row_id", [f"d{i:06d}" for i in range(1, 401)])
    kinds = column_kinds(frame)
    manifest = {
        "columns": kinds,
        "numeric_columns": [k["name"] for k in kinds if k["kind"] == "numeric"],
        "target": "target",
        "task": "regression",
    }
    return development, holdout, manifest


def _written(settings: Settings) -> tuple[store.DatasetPaths, pd.DataFrame, pd.DataFrame]:
    development, holdout, manifest = _parts()
    return store.write_dataset(settings, DS, development, holdout, manifest), development, holdout


def test_layout_and_contents(settings: Settings) -> None:
    paths, development, holdout = _written(settings)
    assert paths.root == settings.data_dir / "datasets" / DS
    assert paths.sealed_holdout == settings.data_dir / "sealed" / DS / "holdout.parquet"
    stored = pq.read_table(paths.development).to_pandas()
    assert stored.columns[0] == "row_id"
    pd.testing.assert_frame_equal(stored, development)
    manifest = json.loads(paths.manifest.read_text())
    assert manifest["numeric_columns"][-2:] == ["target", "refrigerated"]
    matrix = np.load(paths.numeric)
    assert matrix.dtype == np.float64 and matrix.flags["C_CONTIGUOUS"]
    expected = development[manifest["numeric_columns"]].astype(float).to_numpy()
    assert np.array_equal(matrix, expected)
    pd.testing.assert_frame_equal(pq.read_table(paths.sealed_holdout).to_pandas(), holdout)


def test_sealed_directory_and_file_are_private(settings: Settings) -> None:
    paths, _, _ = _written(settings)
    assert stat.S_IMODE(paths.sealed_holdout.stat().st_mode) == 0o600
    assert stat.S_IMODE(paths.sealed_holdout.parent.stat().st_mode) == 0o700
    assert stat.S_IMODE((settings.data_dir / "sealed").stat().st_mode) == 0o700


def test_sealed_parts_are_private_whatever_the_umask(settings: Settings) -> None:
    previous = os.umask(0)
    try:
        paths, _, _ = _written(settings)
        key = store.fingerprint_key(settings)
    finally:
        os.umask(previous)
    assert len(key) == 32
    secret = settings.data_dir / "secrets" / "fingerprint.key"
    modes = {p: stat.S_IMODE(p.stat().st_mode) for p in (
        settings.data_dir, settings.data_dir / "sealed", paths.sealed_holdout.parent, paths.sealed_holdout,
        secret.parent, secret)}
    assert modes == {settings.data_dir: 0o700, settings.data_dir / "sealed": 0o700,
                     paths.sealed_holdout.parent: 0o700, paths.sealed_holdout: 0o600,
                     secret.parent: 0o700, secret: 0o600}


def test_nothing_but_the_final_directories_remain(settings: Settings) -> None:
    _written(settings)
    assert [p.name for p in (settings.data_dir / "datasets").iterdir()] == [DS]
    assert [p.name for p in (settings.data_dir / "sealed").iterdir()] == [DS]


def test_a_failed_write_leaves_nothing(settings: Settings) -> None:
    development, holdout, manifest = _parts()
    manifest["not_json"] = object()  # fails after the parquet and npy files were written
    with pytest.raises(TypeError):
        store.write_dataset(settings, DS, development, holdout, manifest)
    assert list((settings.data_dir / "datasets").iterdir()) == []
    assert list((settings.data_dir / "sealed").iterdir()) == []


def test_writing_over_an_existing_dataset_is_a_conflict(settings: Settings) -> None:
    _written(settings)
    development, holdout, manifest = _parts()
    with pytest.raises(Conflict):
        store.write_dataset(settings, DS, development, holdout, manifest)
    assert store.dataset_paths(settings, DS).development.is_file()  # the first one is untouched


def test_remove_dataset_removes_both_sides(settings: Settings) -> None:
    paths, _, _ = _written(settings)
    store.remove_dataset(settings, DS)
    assert not paths.root.exists() and not paths.sealed_holdout.parent.exists()
    store.remove_dataset(settings, DS)  # removing twice is fine


@pytest.mark.parametrize("bad", ["../etc", "ds_1/../../x", "", ".hidden", "a/b"])
def test_ids_that_are_not_one_path_component_are_not_found(settings: Settings, bad: str) -> None:
    with pytest.raises(NotFound):
        store.dataset_paths(settings, bad)


def test_load_development_frame_and_its_columns(settings: Settings) -> None:
    _, development, _ = _written(settings)
    pd.testing.assert_frame_equal(store.load_development_frame(settings, DS), development)
    some = store.load_development_frame(settings, DS, ["row_id", "bmi"])
    assert list(some.columns) == ["row_id", "bmi"]
    with pytest.raises(InputError) as caught:
        store.load_development_frame(settings, DS, ["bmi", "payload_kg"])
    assert "'payload_kg'" in caught.value.detail and "'bmi'" in caught.value.detail
    with pytest.raises(NotFound):
        store.load_development_frame(settings, "ds_missing")


def test_manifest_names_the_numeric_columns_finite_in_every_development_row(settings: Settings) -> None:
    development, holdout, manifest = _parts()
    development.loc[3, "bmi"] = np.nan  # a missing value
    development.loc[5, "bp"] = np.inf  # an infinity: as unusable to an estimator as a missing value
    holdout.loc[0, "age"] = np.nan  # the sealed rows say nothing about the development rows
    store.write_dataset(settings, DS, development, holdout, manifest)
    numeric = store.load_numeric(settings, DS)
    expected = [c for c in manifest["numeric_columns"] if np.isfinite(development[c].astype(float)).all()]
    assert "bmi" not in numeric.finite and "bp" not in numeric.finite and "age" in numeric.finite
    assert numeric.finite == frozenset(expected) and len(expected) == len(manifest["numeric_columns"]) - 2
    assert json.loads(store.dataset_paths(settings, DS).manifest.read_text())["finite_columns"] == expected


def test_a_manifest_written_before_finite_columns_knows_none_finite(settings: Settings) -> None:
    paths, _, _ = _written(settings)
    manifest = json.loads(paths.manifest.read_text())
    del manifest["finite_columns"]
    paths.manifest.write_text(json.dumps(manifest))
    assert store.load_numeric(settings, DS).finite == frozenset()


def test_load_numeric_is_a_read_only_memory_map(settings: Settings) -> None:
    _, development, _ = _written(settings)
    numeric = store.load_numeric(settings, DS)
    matrix, names = numeric.matrix, numeric.columns
    assert isinstance(matrix, np.memmap) and not matrix.flags["WRITEABLE"]
    assert names[0] == "age" and matrix.shape == (400, len(names))
    assert np.array_equal(matrix[:, names.index("bmi")], development["bmi"].to_numpy())


@pytest.mark.parametrize("chunk_rows", [7, 50_000])
def test_development_csv_streams_header_first_and_reads_back(settings: Settings, chunk_rows: int) -> None:
    _, development, _ = _written(settings)
    chunks = list(store.iter_development_csv(settings, DS, chunk_rows=chunk_rows))
    assert chunks[0].startswith("row_id,age,sex,")
    assert sum(c.count("row_id,") for c in chunks) == 1, "the header appears once"
    assert len(chunks) == -(-400 // chunk_rows)
    back = pd.read_csv(io.StringIO("".join(chunks)), dtype={"row_id": str})
    pd.testing.assert_frame_equal(back, development, check_dtype=False)
    assert np.array_equal(back["bmi"].to_numpy(), development["bmi"].to_numpy())  # exact floats


def test_the_seal_opens_with_its_fingerprint(settings: Settings) -> None:
    _, _, holdout = _written(settings)
    opened = store.open_sealed_holdout(settings, DS, fingerprint_frame(holdout))
    pd.testing.assert_frame_equal(opened, holdout)


def test_a_wrong_fingerprint_breaks_the_seal(settings: Settings) -> None:
    _written(settings)
    with pytest.raises(SealBroken) as caught:
        store.open_sealed_holdout(settings, DS, "0" * 64)
    assert caught.value.status == 500 and "does not match" in caught.value.detail


def test_one_changed_value_in_the_sealed_file_breaks_the_seal(settings: Settings) -> None:
    paths, _, holdout = _written(settings)
    fingerprint = fingerprint_frame(holdout)
    tampered = holdout.copy()
    tampered.loc[5, "bmi"] += 1e-9
    pq.write_table(pa.Table.from_pandas(tampered, preserve_index=False), paths.sealed_holdout)
    with pytest.raises(SealBroken) as caught:
        store.open_sealed_holdout(settings, DS, fingerprint)
    # The error says that the seal failed, never what is inside it.
    assert str(tampered.loc[5, "bmi"])[:8] not in caught.value.detail
    assert fingerprint not in caught.value.detail


@pytest.mark.parametrize("damage", ["missing", "garbage"])
def test_a_missing_or_unreadable_seal_is_broken(settings: Settings, damage: str) -> None:
    paths, _, holdout = _written(settings)
    if damage == "missing":
        paths.sealed_holdout.unlink()
    else:
        paths.sealed_holdout.write_bytes(b"not parquet at all")
    with pytest.raises(SealBroken) as caught:
        store.open_sealed_holdout(settings, DS, fingerprint_frame(holdout))
    assert "cannot be read" in caught.value.detail
