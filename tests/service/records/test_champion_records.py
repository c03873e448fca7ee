"""Champion tests and champion folds in the records: stored once, a stream without gaps, on SQLite and PostgreSQL."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from sqlalchemy import Engine
from sqlalchemy.exc import IntegrityError

from service.gate.online import Stream
from service.records import champion_folds, champion_tests
from service.settings import Settings
from tests.service.records.test_records import _dataset, _submission
from tests.support.records import upgraded_engine


@pytest.fixture
def engine(settings: Settings) -> Iterator[Engine]:
    eng = upgraded_engine(settings)
    yield eng
    eng.dispose()


def test_a_decision_is_stored_once_and_the_stream_is_read_in_order(engine: Engine) -> None:
    ds = _dataset(engine)
    champion, a, b, c = (_submission(engine, idem=x) for x in "hxyz")
    entry = {"rule": "champion_holdout", "outcome": "pass"}
    base = {"dataset_id": ds, "champion_id": champion, "entry": entry}
    assert champion_tests.record(engine, {**base, "submission_id": a, "seq": 1, "level": 0.00125, "passed": True})[1]
    again, created = champion_tests.record(engine, {**base, "submission_id": a, "seq": 2, "level": 0.1,
                                                     "passed": False})
    assert not created and again["seq"] == 1 and again["passed"] is True  # the first decision stands
    champion_tests.record(engine, {**base, "submission_id": b, "seq": 2, "level": 0.0003, "passed": False})
    champion_tests.record(engine, {**base, "submission_id": c, "entry": {"outcome": "inconclusive"}})  # no test
    assert champion_tests.stream(engine, ds) == Stream(2, (1,))
    # Two decisions at one place of the stream fail loudly instead of sharing a level.
    d = _submission(engine, idem="w")
    with pytest.raises(IntegrityError):
        champion_tests.record(engine, {**base, "submission_id": d, "seq": 2, "level": 0.0003, "passed": False})


def test_champion_folds_are_cached_per_plan(engine: Engine) -> None:
    _dataset(engine)
    champion = _submission(engine, idem="h")
    fields = {"status": "ok", "scores": {"rmse": 3.0}, "train_rows": 40, "test_rows": 40, "error": None}
    assert champion_folds.record(engine, champion, "kfold-2-7", 0, 1, **fields)
    assert not champion_folds.record(engine, champion, "kfold-2-7", 0, 1, **{**fields, "scores": {"rmse": 9.0}})
    champion_folds.record(engine, champion, "kfold-2-7", 0, 0, **fields)
    champion_folds.record(engine, champion, "kfold-3-7", 0, 0, **fields)
    rows = champion_folds.rows(engine, champion, "kfold-2-7")
    assert [(r["repeat"], r["fold"], r["scores"]["rmse"]) for r in rows] == [(0, 0, 3.0), (0, 1, 3.0)]
    assert champion_folds.plan_name(("kfold", 2, 7)) == "kfold-2-7"
