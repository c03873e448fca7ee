"""Fixtures of the worker tests: a worker context on tmp_path, installed for the job functions."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from service.settings import Settings
from tests.support.records import upgraded_engine
from worker.jobs import runtime


@pytest.fixture
def ctx(tmp_path: Path) -> Iterator[runtime.WorkerContext]:
    """A worker context (SQLite records and a data dir under tmp_path), installed for worker.jobs."""
    settings = Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={})
    context = runtime.WorkerContext(settings=settings, engine=upgraded_engine(settings))
    runtime.install(context)
    yield context
    runtime.uninstall()
    context.engine.dispose()
