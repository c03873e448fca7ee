"""``sealfold db upgrade`` and ``sealfold db current`` as a deployment runs them: real processes, a real DB file."""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

from service.records import schema
from service.records.engine import make_engine
from service.settings import Settings
from tests.support.servers import sealfold_argv


def _db(tmp_path: Path, action: str) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if k != "DATABASE_URL"}
    env["SEALFOLD_DATA_DIR"] = str(tmp_path)
    return subprocess.run([*sealfold_argv(), "db", action], capture_output=True, text=True, env=env, timeout=60)


def test_current_says_none_and_fails_until_upgrade_then_names_the_head(tmp_path: Path) -> None:
    head = schema.head_revision()
    before = _db(tmp_path, "current")
    assert (before.returncode, before.stdout) == (1, "none\n")
    assert f"this code needs {head}: run `sealfold db upgrade`" in before.stderr

    upgraded = _db(tmp_path, "upgrade")
    assert upgraded.returncode == 0, upgraded.stderr
    assert upgraded.stdout == f"records database at revision {head} (upgraded from none)\n"
    again = _db(tmp_path, "upgrade")
    assert again.stdout == f"records database at revision {head} (already current)\n"

    after = _db(tmp_path, "current")
    assert (after.returncode, after.stdout, after.stderr) == (0, f"{head}\n", "")
    # the file it upgraded is the one the settings name (SQLAlchemy's inspector, not our own reader)
    engine = make_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    try:
        assert schema.current_revision(engine) == head
        schema.require_current(engine)
    finally:
        engine.dispose()


def test_an_older_database_is_upgraded_from_its_revision(tmp_path: Path) -> None:
    engine = make_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    try:
        schema.upgrade(engine, "0002")
    finally:
        engine.dispose()
    assert _db(tmp_path, "current").stdout == "0002\n"
    upgraded = _db(tmp_path, "upgrade")
    assert upgraded.stdout == f"records database at revision {schema.head_revision()} (upgraded from 0002)\n"


def test_keys_create_refuses_a_database_that_is_behind(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if k != "DATABASE_URL"}
    env["SEALFOLD_DATA_DIR"] = str(tmp_path)
    out = subprocess.run([*sealfold_argv(), "keys", "create", "--team", "fleet", "--role", "steward"],
                         capture_output=True, text=True, env=env, timeout=60)
    assert (out.returncode, out.stdout) == (2, "")
    assert "the records database is at revision none" in out.stderr and "sealfold db upgrade" in out.stderr
