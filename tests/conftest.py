"""Fixtures every test folder may use: a private redis-server for the session."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest

from service.settings import Settings
from tests.support.servers import redis_server


@pytest.fixture(scope="session")
def redis_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A private redis-server for the whole session (never the machine's own on 6379)."""
    with redis_server(tmp_path_factory.mktemp("redis")) as url:
        yield url


@pytest.fixture(scope="session", autouse=True)
def holdout_pad_off() -> Iterator[None]:
    """Run every test with the holdout step's deadline off (``holdout_pad_seconds`` 0) unless it sets one.

    With the deployment's default pad each verdict is shown a second or two after the holdout step begins
    (service.gate.timing), which tests of anything else would only wait through. Settings built from an
    explicit environment and the workers test stacks start (which inherit os.environ) get 0; the tests of
    the deadline and of what it hides (tests/service/gate/test_timing.py, tests/worker/jobs/test_holdout_timing.py,
    tests/e2e/test_holdout_timing.py) set a pad of their own.
    """
    real_load = Settings.load.__func__  # type: ignore[attr-defined]

    def load(cls: type[Settings], overrides: Any = None, environ: Any = None) -> Settings:
        if environ is not None and "SEALFOLD_HOLDOUT_PAD" not in environ:
            environ = {**environ, "SEALFOLD_HOLDOUT_PAD": "0"}
        return real_load(cls, overrides, environ)  # type: ignore[no-any-return]

    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("SEALFOLD_HOLDOUT_PAD", "0")
        patch.setattr(Settings, "load", classmethod(load))
        yield
