"""A worker refuses to start on a records database that is not at this code's revision."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from service.records import schema
from service.records.engine import make_engine
from service.settings import Settings
from tests.support.servers import stack_environment


def test_a_worker_refuses_a_database_that_is_behind(tmp_path: Path) -> None:
    engine = make_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    schema.upgrade(engine, "0001")
    engine.dispose()
    env = stack_environment(tmp_path, "redis://127.0.0.1:1/0")  # never reached: the check comes first
    out = subprocess.run([sys.executable, "-m", "worker", "--burst"], env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 2, out.stderr
    assert out.stderr.strip().splitlines()[-1] == (
        f"sealfold worker: the records database is at revision 0001, this code needs {schema.head_revision()}: "
        "run `sealfold db upgrade`")
