"""The data identity: one id in the records DB and in the data dir; a different or empty dir is refused."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.ops import data_identity
from service.ops.data_identity import DataNotShared, claim, marker_path
from service.records.engine import make_engine
from service.records.schema import upgrade
from service.settings import Settings


def _engine(tmp_path: Path):  # type: ignore[no-untyped-def]
    engine = make_engine(Settings.load({"data_dir": tmp_path / "records", "database_url": ""}, environ={}))
    upgrade(engine)
    return engine


def test_first_claim_writes_one_id_to_db_and_dir_and_later_claims_agree(tmp_path: Path) -> None:
    engine = _engine(tmp_path)
    data = tmp_path / "data"
    first = claim(engine, data)
    assert marker_path(data).read_text().strip() == first == data_identity.recorded_identity(engine)
    assert claim(engine, data) == first  # idempotent
    assert data_identity.check(engine, data) is None


def test_an_empty_or_foreign_dir_is_refused_and_left_unwritten(tmp_path: Path) -> None:
    engine = _engine(tmp_path)
    claim(engine, tmp_path / "data")
    empty = tmp_path / "other-host"
    with pytest.raises(DataNotShared, match="no deployment-id marker"):
        claim(engine, empty)
    assert not marker_path(empty).exists()
    foreign = tmp_path / "foreign"
    claim(_engine(tmp_path / "second"), foreign)  # another deployment's dir
    with pytest.raises(DataNotShared, match="belongs to another deployment"):
        claim(engine, foreign)
    assert "belongs to another deployment" in (data_identity.check(engine, foreign) or "")


def test_a_dir_made_before_identities_is_claimed_with_its_files_kept(tmp_path: Path) -> None:
    engine = _engine(tmp_path)
    data = tmp_path / "data"
    (data / "datasets").mkdir(parents=True)
    (data / "datasets" / "ds_old.parquet").write_bytes(b"kept")
    identity = claim(engine, data)
    assert marker_path(data).read_text().strip() == identity
    assert (data / "datasets" / "ds_old.parquet").read_bytes() == b"kept"


def test_a_db_with_no_identity_is_reported_to_a_checker(tmp_path: Path) -> None:
    engine = _engine(tmp_path)
    assert "sealfold db upgrade" in (data_identity.check(engine, tmp_path / "data") or "")
