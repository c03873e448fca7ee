"""A backup taken while the service runs restores to a working deployment with its sealed data intact."""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import pytest

from service.app import create_app
from service.ops import data_identity
from service.ops.backup import backup
from service.records import datasets
from service.records.engine import make_engine
from service.settings import Settings
from service.vault.store import open_sealed_holdout
from tests.support.api import Api


def test_backup_then_restore_to_a_new_dir(api: Api, dataset: dict[str, Any], tmp_path: Path) -> None:
    settings = api.app.extensions["sealfold"].settings
    saved = backup(settings, tmp_path / "backup")
    assert "records.sqlite3" in saved and "deployment-id" in saved and "sealed" in saved
    assert (tmp_path / "backup" / "records.sqlite3").stat().st_mode & 0o077 == 0  # owner only, as the original

    restored = tmp_path / "restored"
    shutil.copytree(tmp_path / "backup", restored)
    overrides = {"data_dir": restored, "database_url": "", "redis_url": "redis://127.0.0.1:1/0"}
    app = create_app(overrides)  # checks the schema revision and the data identity
    engine = make_engine(Settings.load(overrides, environ={}))
    try:
        assert data_identity.check(engine, restored) is None
        row = datasets.get_internal(engine, dataset["id"])
        assert row is not None and row["name"] == "diabetes"
        # The sealed rows came back byte for byte: their fingerprint still matches the record.
        holdout = open_sealed_holdout(Settings.load(overrides, environ={}), dataset["id"],
                                      row["holdout_fingerprint"])
        assert len(holdout) == dataset["rows"]["holdout"]
    finally:
        engine.dispose()
    assert app is not None


def test_a_backup_never_overwrites(api: Api, tmp_path: Path) -> None:
    (tmp_path / "taken").mkdir()
    with pytest.raises(FileExistsError):
        backup(api.app.extensions["sealfold"].settings, tmp_path / "taken")


def test_the_backup_command_saves_a_dir_it_can_restore(api: Api, dataset: dict[str, Any], tmp_path: Path,
                                                      monkeypatch: pytest.MonkeyPatch,
                                                      capsys: pytest.CaptureFixture[str]) -> None:
    from service.cli.main import main

    settings = api.app.extensions["sealfold"].settings
    monkeypatch.setenv("SEALFOLD_DATA_DIR", str(settings.data_dir))
    monkeypatch.delenv("DATABASE_URL", raising=False)
    assert main(["backup", str(tmp_path / "saved")]) == 0
    assert "records.sqlite3" in capsys.readouterr().out
    assert main(["backup", str(tmp_path / "saved")]) == 1  # never over an existing backup
    assert "exists" in capsys.readouterr().err
