"""The records schema's migrations on SQLite and PostgreSQL: fresh, from an older revision, from before them.

The reference for "the same schema" is Alembic's own comparison of a live database with table definitions
(``alembic.autogenerate.compare_metadata``), and for columns SQLAlchemy's inspector, both run against the
database server itself.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Engine, inspect, text

from service.records import schema, submissions
from service.records.engine import make_engine
from service.records.migrations.versions.rev01_baseline import baseline
from service.records.tables import metadata
from service.settings import Settings
from service.submission.document import submission_document

SUMMARY = {"summary": {"rmse": {"mean": 54.2, "std": 3.1}}, "failures": [], "baseline": {"estimator": "Dummy"}}
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


def _differences(engine: Engine) -> list[Any]:
    """What Alembic finds between the live database and ``service.records.tables``: [] when they agree."""
    with engine.connect() as conn:
        return list(compare_metadata(MigrationContext.configure(conn), metadata))


def _columns(engine: Engine, table: str) -> set[str]:
    return {c["name"] for c in inspect(engine).get_columns(table)}


def _old_rows(engine: Engine, *, with_cv_summary: Any = None) -> None:
    """A dataset, a submission with its summary in ``result``, a fold and a holdout outcome, as 0001 had them."""
    t = baseline.tables
    with engine.begin() as conn:
        conn.execute(t["datasets"].insert().values(
            id="ds_old", team="fleet", name="routes", task="regression", target="y",
            columns=[{"name": "x", "kind": "numeric", "dtype": "float64"}], rows_total=100, rows_development=80,
            rows_holdout=20, holdout_scheme="random", holdout_fraction=0.2, sealing_seed="1",
            fold_plan={"scheme": "kfold", "folds": 5, "seed": 7}, fingerprint="a" * 64,
            development_fingerprint="b" * 64, holdout_fingerprint="c" * 64, created_by="key_x", created_at=NOW))
        values: dict[str, Any] = dict(
            id="sub_old", team="fleet", dataset_id="ds_old", owner_key_id="key_1", label="", state="succeeded",
            config={"model": {"estimator": "Ridge"}, "validation": {"folds": 5, "repeats": 1}, "metrics": ["rmse"]},
            config_fingerprint="f" * 64, folds_total=5, result=SUMMARY, created_at=NOW, updated_at=NOW)
        conn.execute(t["submissions"].insert().values(**values))
        if with_cv_summary is not None:
            both = {**values, "id": "sub_both", "config_fingerprint": "e" * 64}
            conn.execute(t["submissions"].insert().values(**both))
            conn.execute(text("UPDATE submissions SET cv_summary = :v WHERE id = 'sub_both'"),
                         {"v": with_cv_summary})
        conn.execute(t["fold_results"].insert().values(
            submission_id="sub_old", repeat=0, fold=0, status="ok", train_rows=64, test_rows=16,
            scores={"rmse": 54.0}, finished_at=NOW))
        conn.execute(t["holdout_scores"].insert().values(
            submission_id="sub_old", scores={"rmse": 55.0}, holdout_fingerprint="c" * 64, scored_at=NOW))


def _assert_old_rows_kept(engine: Engine) -> None:
    row = submissions.get(engine, "sub_old")
    assert row is not None and row["cv_summary"] == SUMMARY and row["warnings"] is None
    served = submission_document(engine, row)["result"]
    assert served is not None and served["cv"]["summary"] == SUMMARY["summary"]
    fold = submissions.fold_rows(engine, "sub_old")[0]
    assert fold["scores"] == {"rmse": 54.0} and fold["undefined"] is None and fold["train_scored_rows"] is None
    held = submissions.get_holdout(engine, "sub_old")
    assert held is not None and held["scores"] == {"rmse": 55.0} and held["error"] is None


def test_a_fresh_database_is_upgraded_to_exactly_the_tables(settings: Settings) -> None:
    engine = make_engine(settings)
    try:
        assert schema.current_revision(engine) is None
        schema.upgrade(engine)
        assert schema.current_revision(engine) == schema.head_revision()
        assert _differences(engine) == []
        schema.upgrade(engine)  # a second run finds nothing to do
        assert schema.current_revision(engine) == schema.head_revision()
        schema.require_current(engine)
    finally:
        engine.dispose()


def test_a_database_at_the_first_revision_is_upgraded_in_place_with_its_rows(settings: Settings) -> None:
    engine = make_engine(settings)
    try:
        schema.upgrade(engine, "0001")
        assert "result" in _columns(engine, "submissions") and "cv_summary" not in _columns(engine, "submissions")
        _old_rows(engine)
        schema.upgrade(engine)
        assert schema.current_revision(engine) == schema.head_revision()
        assert "result" not in _columns(engine, "submissions")
        assert _differences(engine) == []
        _assert_old_rows_kept(engine)
    finally:
        engine.dispose()


def test_a_database_made_before_migrations_is_adopted(settings: Settings) -> None:
    # What start-up used to do: create_all of the tables, no revision recorded, and later releases adding
    # cv_summary beside result and copying into it only where it was empty.
    engine = make_engine(settings)
    try:
        baseline.create_all(engine)
        with engine.begin() as conn:
            conn.execute(text("ALTER TABLE datasets DROP COLUMN balance"))  # older still: no balance column
            conn.execute(text("ALTER TABLE submissions ADD COLUMN cv_summary JSON"))
        newer = {**SUMMARY, "summary": {"rmse": {"mean": 50.0, "std": 2.0}}}
        _old_rows(engine, with_cv_summary=json.dumps(newer))
        assert schema.current_revision(engine) is None
        schema.upgrade(engine)
        assert schema.current_revision(engine) == schema.head_revision()
        assert _differences(engine) == []
        _assert_old_rows_kept(engine)
        both = submissions.get(engine, "sub_both")
        assert both is not None and both["cv_summary"] == newer  # the stale old column did not overwrite it
    finally:
        engine.dispose()


def test_a_database_behind_is_refused_with_both_revisions_and_the_command(settings: Settings) -> None:
    engine = make_engine(settings)
    try:
        with pytest.raises(schema.SchemaOutOfDate) as empty:
            schema.require_current(engine)
        assert str(empty.value).startswith("the records database is at revision none")
        schema.upgrade(engine, "0003")
        with pytest.raises(schema.SchemaOutOfDate) as behind:
            schema.require_current(engine)
        assert str(behind.value) == (f"the records database is at revision 0003, this code needs "
                                     f"{schema.head_revision()}: run `sealfold db upgrade`")
    finally:
        engine.dispose()


def test_the_revisions_form_one_chain_from_the_first() -> None:
    chain = schema.revision_chain()
    files = [p for p in (schema.MIGRATIONS_DIR / "versions").glob("*.py") if p.name != "__init__.py"]
    assert chain[-1] == "0001" and chain[0] == schema.head_revision()
    assert len(set(chain)) == len(chain) == len(files)


def test_stored_verdicts_become_the_first_entry_of_their_history(settings: Settings) -> None:
    from service.records import verdicts

    engine = make_engine(settings)
    try:
        schema.upgrade(engine, "0001")
        _old_rows(engine)
        schema.upgrade(engine, "0006")
        judged = {"decision": "fail", "reasons": ["misses the bar"], "policy_version": 2}
        with engine.begin() as conn:
            conn.execute(text("UPDATE submissions SET verdict = :v, policy_version = 2, finished_at = :t "
                              "WHERE id = 'sub_old'"), {"v": json.dumps(judged), "t": NOW})
        schema.upgrade(engine)
        assert _differences(engine) == []
        history = verdicts.history(engine, "sub_old")
        assert len(history) == 1
        assert history[0]["verdict"] == judged and history[0]["policy_version"] == 2
        assert history[0]["judged_by"] == "system" and history[0]["holdout_spent"] == 0
        assert history[0]["judged_at"].startswith("2026-12-01T12:00:00")
    finally:
        engine.dispose()
