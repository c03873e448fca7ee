"""Fixtures of the records tests: settings naming a fresh SQLite file or a throwaway PostgreSQL database."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from service.settings import Settings
from tests.support.servers import postgres_database


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def settings(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Settings]:
    """Settings of an empty records DB, once per dialect."""
    if request.param == "sqlite":
        yield Settings.load({"data_dir": tmp_path}, environ={})
        return
    with postgres_database() as url:
        yield Settings.load({"data_dir": tmp_path, "database_url": url}, environ={})
