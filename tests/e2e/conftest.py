"""Fixtures of the end-to-end tests: one live stack shared by the session."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.support.stack import Stack, running_stack


@pytest.fixture(scope="session")
def stack(tmp_path_factory: pytest.TempPathFactory, redis_url: str) -> Iterator[Stack]:
    """One live stack for the session's end-to-end tests."""
    with running_stack(tmp_path_factory.mktemp("stack"), redis_url, "e2e") as live:
        yield live
