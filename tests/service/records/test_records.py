"""Records on SQLite and PostgreSQL: keys, idempotency, fold rows, and the holdout stored once."""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import Engine

from service.records import datasets, keys, submissions
from service.records.engine import utcnow
from service.settings import Settings
from service.vocabulary import LIVE_STATES
from tests.support.records import upgraded_engine


@pytest.fixture
def engine(settings: Settings) -> Iterator[Engine]:
    eng = upgraded_engine(settings)
    yield eng
    eng.dispose()


def _dataset(engine: Engine, team: str = "fleet") -> str:
    row = {
        "id": "ds_test1", "team": team, "name": "routes", "task": "regression", "target": "y",
        "columns": [{"name": "x", "kind": "numeric", "dtype": "float64"}], "classes": None,
        "rows_total": 100, "rows_development": 80, "rows_holdout": 20, "holdout_scheme": "random",
        "holdout_fraction": 0.2, "sealing_seed": "12345", "fold_plan": {"scheme": "kfold", "folds": 5, "seed": 7},
        "fingerprint": "a" * 64, "development_fingerprint": "b" * 64, "holdout_fingerprint": "c" * 64,
        "created_by": "key_x", "created_at": utcnow(),
    }
    datasets.insert(engine, row)
    return "ds_test1"


def _submission(engine: Engine, owner: str = "key_1", idem: str | None = None) -> str:
    sub_id = f"sub_{owner}_{idem}"
    submissions.insert(engine, {
        "id": sub_id, "team": "fleet", "dataset_id": "ds_test1", "owner_key_id": owner, "label": "",
        "config": {"validation": {"folds": 5, "repeats": 1}}, "config_fingerprint": "f" * 64,
        "folds_total": 5, "idempotency_key": idem, "request_fingerprint": "r" * 64,
    })
    return sub_id


def test_key_round_trip_and_revocation(engine: Engine) -> None:
    info, token = keys.create_key(engine, "fleet", "steward", "ana")
    assert keys.authenticate(engine, token) == info
    assert keys.authenticate(engine, token + "x") is None
    assert info.can("submitter") and info.can("steward") and not info.can("admin")
    keys.revoke(engine, info.id)
    assert keys.authenticate(engine, token) is None


def test_stored_token_is_only_a_hash(engine: Engine) -> None:
    from sqlalchemy import select

    from service.records.tables import api_keys

    _, token = keys.create_key(engine, "fleet", "submitter")
    with engine.connect() as conn:
        stored = conn.execute(select(api_keys.c.token_hash)).scalar_one()
    assert token not in stored and len(stored) == 64


def test_public_dataset_view_hides_the_seal(engine: Engine) -> None:
    ds_id = _dataset(engine)
    view = datasets.get(engine, ds_id)
    assert view is not None
    assert "sealing_seed" not in view and "holdout_fingerprint" not in view
    assert view["rows"] == {"total": 100, "development": 80, "holdout": 20}


def test_holdout_is_stored_once_and_later_callers_read_the_first(engine: Engine) -> None:
    _dataset(engine)
    sub_id = _submission(engine)
    first, created = submissions.store_holdout_once(engine, sub_id, {"rmse": 1.5}, "c" * 64, 0.1)
    again, created_again = submissions.store_holdout_once(engine, sub_id, {"rmse": 9.9}, "c" * 64, 0.1)
    assert created and not created_again
    assert first == again == {"rmse": 1.5}


def test_fold_result_kept_from_first_write(engine: Engine) -> None:
    _dataset(engine)
    sub_id = _submission(engine)
    fields = {"status": "ok", "train_rows": 64, "test_rows": 16, "scores": {"rmse": 1.0}}
    assert submissions.record_fold(engine, sub_id, 0, 0, **fields)
    assert not submissions.record_fold(engine, sub_id, 0, 0, **{**fields, "scores": {"rmse": 2.0}})
    assert submissions.folds_done(engine, sub_id) == 1
    assert submissions.fold_rows(engine, sub_id)[0]["scores"] == {"rmse": 1.0}


def test_state_transitions_never_go_backwards(engine: Engine) -> None:
    _dataset(engine)
    sub_id = _submission(engine)
    submissions.mark_running(engine, sub_id)
    assert submissions.transition(engine, sub_id, "succeeded", ("running",))
    submissions.mark_running(engine, sub_id)
    assert not submissions.transition(engine, sub_id, "canceled", LIVE_STATES)
    row = submissions.get(engine, sub_id)
    assert row is not None and row["state"] == "succeeded" and row["finished_at"] is not None


def test_idempotency_key_is_unique_per_owner(engine: Engine) -> None:
    from sqlalchemy.exc import IntegrityError

    _dataset(engine)
    _submission(engine, "key_1", "abc")
    _submission(engine, "key_2", "abc")  # another owner may reuse the same key
    found = submissions.find_by_idempotency_key(engine, "key_1", "abc")
    assert found is not None and found["owner_key_id"] == "key_1"
    with pytest.raises(IntegrityError):
        submissions.insert(engine, {
            "id": "sub_dup", "team": "fleet", "dataset_id": "ds_test1", "owner_key_id": "key_1",
            "config": {}, "config_fingerprint": "f" * 64, "folds_total": 5, "idempotency_key": "abc",
        })


def test_a_new_sqlite_records_file_and_its_wal_are_owner_only(tmp_path: Path) -> None:
    # Raw holdout scores and mechanism noise live here: 0600 files in a 0700 data dir, whatever the umask.
    settings = Settings.load({"data_dir": tmp_path / "data"}, environ={})
    previous = os.umask(0)
    try:
        engine = upgraded_engine(settings)  # a new file, created by the upgrade
        try:
            keys.create_key(engine, "fleet", "steward", "steward")  # a write: SQLite opens -wal and -shm
            records = settings.data_dir / "records.sqlite3"
            files = [records, records.with_name("records.sqlite3-wal"), records.with_name("records.sqlite3-shm")]
            assert all(f.is_file() for f in files), sorted(p.name for p in settings.data_dir.iterdir())
            assert {f.name: stat.S_IMODE(f.stat().st_mode) for f in files} == {f.name: 0o600 for f in files}
            assert stat.S_IMODE(settings.data_dir.stat().st_mode) == 0o700
        finally:
            engine.dispose()
    finally:
        os.umask(previous)
