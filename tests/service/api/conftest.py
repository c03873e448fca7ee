"""Fixtures of the API tests that fuzz the whole surface: one app with real records to aim at."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pytest

from tests.support.api import Api, open_api, submission_body
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.reviews import make_submission
from tests.support.servers import register_worker


@dataclass(frozen=True)
class FuzzTarget:
    """The app under fuzzing and the ids of real records that path parameters may name."""

    api: Api
    dataset_ids: tuple[str, ...]
    submission_ids: tuple[str, ...]


@pytest.fixture(scope="module")
def fuzz_target(tmp_path_factory: pytest.TempPathFactory, redis_url: str) -> Iterator[FuzzTarget]:
    """One app for a whole fuzz run: the diabetes data registered, a queued and a finished submission.

    The worker's configuration check answers "ok" (no worker runs here), so accepted submissions are
    stored and queued on the session's private redis-server (a queue of their own, which no worker
    reads); a real one, because a re-judge takes the dataset's release lock, a Lua script fakeredis
    does not run.
    """
    import dataclasses

    from redis import Redis

    from service.submission import dispatch

    def check(redis: Any, settings: Any, config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
        return {"ok": True, "has_proba": False, "linear": True}

    with pytest.MonkeyPatch.context() as patch, open_api(tmp_path_factory.mktemp("fuzz")) as api:
        patch.setattr(dispatch, "check_config_remote", check)
        ctx = api.app.extensions["sealfold"]
        settings = dataclasses.replace(ctx.settings, queue_name="fuzz")
        api.app.extensions["sealfold"] = dataclasses.replace(ctx, settings=settings, redis=Redis.from_url(redis_url))
        reply = api.upload("steward", csv_bytes(diabetes_frame()), name="diabetes", target="target",
                           task="regression")
        assert reply.status_code == 201, reply.get_data(as_text=True)
        dataset = reply.get_json()
        queued = api.post("submitter", "/v1/submissions", json=submission_body(dataset))
        assert queued.status_code == 202, queued.get_data(as_text=True)
        finished = make_submission(api.engine, dataset, api.key_ids["submitter"], label="finished",
                                   scores=[55, 56, 54, 57, 53])
        # /readyz answers 503 without a live worker, which the fuzzer counts as a server error: register one
        # (as a started worker does) so the run does not depend on another test's worker still being alive.
        worker = register_worker(api.app.extensions["sealfold"].redis, settings.queue_name, name="fuzz-worker")
        try:
            yield FuzzTarget(api, (dataset["id"],), (queued.get_json()["id"], finished))
        finally:
            worker.register_death()


@pytest.fixture
def submitted(api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]) -> dict[str, Any]:
    """One accepted submission (the worker's configuration check answers "ok"), as the POST answered it."""
    reply = api.post("submitter", "/v1/submissions", json=submission_body(dataset))
    assert reply.status_code == 202, reply.get_data(as_text=True)
    return dict(reply.get_json())
