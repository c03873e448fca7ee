"""Warm the worker process before it forks: run every job's code path once on a tiny invented table.

The fold process (``worker.process.fold_process``) and every work horse are forks of this process, so
whatever Python, scikit-learn, pandas, pyarrow and SQLAlchemy set up lazily on first use (parameter
validation and metric dispatch, narwhals' plugin lookup, ``pyarrow.dataset``, compiled SQL
statements, scipy's t distribution) would be paid again by each of them: about 20 ms of a 50 ms
fold on 1,000 rows in a horse that dies after one job. Done here once, they inherit it.
``gc.freeze()`` then moves everything alive into the permanent generation, so a collection in a
child never walks (and so never copies) the parent's objects. What a child still pays is the
copy-on-write of the pages it touches (some 3,500 for such a fold).

What the warm-up touches, and why that is safe:
- files: only a temporary data dir of its own, removed afterwards;
- the records DB: reads, updates whose WHERE matches no row (an id ``new_id`` never makes), inserts
  the foreign key refuses (a submission of that id does not exist) and one insert inside a transaction
  rolled back: nothing is written. The holdout job's writes are among them, because every holdout job
  runs in a fresh horse, which would compile them again each time. Then the engine's pool is disposed,
  so no connection opened here exists when the first horse forks (each horse also gets a fresh pool
  from ``runtime.after_fork``);
- Redis: nothing (the worker's connection is made after the warm-up).
A failing warm-up is logged and the worker starts anyway: it only saves time.
"""

from __future__ import annotations

import dataclasses
import gc
import logging
import tempfile
from contextlib import suppress
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine, select
from sqlalchemy.exc import IntegrityError

from service.catalog import load_catalog
from service.catalog.metrics import METRICS
from service.records import audit, datasets, holdout_claims, submissions
from service.records.tables import submissions as submissions_table
from service.settings import Settings
from service.submission.resolved import ResolvedModel, ValidationPlan
from service.vault import store
from service.vault.fingerprint import fingerprint_frame
from service.vault.tables import column_kinds as kinds_of_frame
from service.vocabulary import LIVE_STATES
from worker.jobs.fold import evaluate_fold
from worker.jobs.runtime import WorkerContext
from worker.jobs.summary import provenance, summary_document
from worker.learning.development import column_kinds, load_development, model_frame, model_matrix, split_for
from worker.learning.pipeline import build_pipeline, uses_frame
from worker.learning.scoring import score_model

log = logging.getLogger(__name__)

WARMUP_DATASET = "warmup"
NO_SUCH_ID = "warm-up"  # new_id() makes "<prefix>_<hex>", so no record can have this id
# (task, target, fold scheme, model documents): no steps, a numeric step, a frame with categories.
MODELS: tuple[tuple[str, str, str, tuple[dict[str, Any], ...]], ...] = (
    ("regression", "y", "kfold", (
        {"estimator": "Ridge", "features": ["x0", "x1"]},
        {"estimator": "Ridge", "features": ["depot", "x0", "x1"], "preprocess": [
            {"transformer": "OneHotEncoder", "columns": ["depot"], "params": {"handle_unknown": "ignore"}},
            {"transformer": "StandardScaler", "columns": ["x0", "x1"]}]},
    )),
    ("classification", "label", "stratified", (
        {"estimator": "LogisticRegression", "features": ["x0", "x1"]},
        {"estimator": "DecisionTreeClassifier", "features": ["x0", "x1"],
         "preprocess": [{"transformer": "StandardScaler", "columns": ["x0", "x1"]}]},
    )),
)


def warm_up(ctx: WorkerContext) -> None:
    """Run the fold, summary and holdout code once, touch the records DB read-only, then freeze the heap."""
    try:
        with tempfile.TemporaryDirectory(prefix="sealfold-warmup-") as tmp:
            _warm_jobs(dataclasses.replace(ctx.settings, data_dir=Path(tmp)))
        _warm_records(ctx)
    except Exception:  # an optimisation only: never keep a worker from starting
        log.warning("worker warm-up failed; jobs will run, only slower at first", exc_info=True)
    finally:
        ctx.engine.dispose()
    gc.collect()
    gc.freeze()


def _invented_parts() -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(0)
    n = 48
    frame = pd.DataFrame({"x0": rng.normal(size=n), "x1": rng.normal(size=n),
                          "depot": pd.Series(rng.choice(["north", "south", "east"], n), dtype="str")})
    frame["y"] = 2.0 * frame["x0"] - frame["x1"] + rng.normal(scale=0.1, size=n)
    frame["label"] = (frame["x0"] > 0).astype(np.int64)
    return frame.iloc[:40].reset_index(drop=True), frame.iloc[40:].reset_index(drop=True)


def _warm_jobs(settings: Settings) -> None:
    dev, hold = _invented_parts()
    kinds = kinds_of_frame(dev)
    manifest = {"columns": kinds, "numeric_columns": [c["name"] for c in kinds if c["kind"] == "numeric"],
                "target": "y", "task": "regression"}
    stored = dev.copy()
    stored.insert(0, store.ROW_ID, [f"d{i + 1:06d}" for i in range(len(dev))])
    store.write_dataset(settings, WARMUP_DATASET, stored, hold, manifest)
    sealed = store.open_sealed_holdout(settings, WARMUP_DATASET, fingerprint_frame(hold))
    catalog = load_catalog()
    for task, target, scheme, models in MODELS:
        dataset = {"id": WARMUP_DATASET, "target": target, "task": task, "columns": kinds,
                   "group_column": None, "time_column": None, "fingerprint": "", "development_fingerprint": ""}
        validation = ValidationPlan(scheme=scheme, folds=2, seed=0)
        metrics = [name for name, spec in METRICS.items() if spec.task == task]
        rows = []
        for model_doc in models:
            model = ResolvedModel.from_document(model_doc)
            data, keys = load_development(settings, dataset, model.features)
            split = split_for(settings, dataset, validation, keys, 0, 0)
            entry = catalog.estimator(model.estimator)
            pipeline = build_pipeline(model, column_kinds(dataset), catalog)
            fields = evaluate_fold(pipeline, data, split, task, metrics, linear=bool(entry and entry.linear),
                                   target=target)
            rows.append({"repeat": 0, "fold": 0, **fields})
            features = list(model.features)
            X = model_frame(sealed, features, column_kinds(dataset)) if uses_frame(features, column_kinds(dataset)) \
                else model_matrix(sealed, features)
            score_model(pipeline, X, sealed[target].to_numpy(), metrics)
        summary_document(rows, [(0, 0), (0, 1)], metrics, task)
        provenance(validation, "", dataset)
    # The holdout and verdict jobs keep per-example values as .npz files (zipfile under numpy).
    kept = settings.data_dir / "per_example.npz"
    np.savez(kept, rmse=np.zeros(3))
    with np.load(kept) as stored:
        stored["rmse"].sum()


def _warm_records(ctx: WorkerContext) -> None:
    engine = ctx.engine
    submissions.get(engine, NO_SUCH_ID)
    datasets.get_internal(engine, NO_SUCH_ID)
    submissions.fold_rows(engine, NO_SUCH_ID)
    submissions.get_holdout(engine, NO_SUCH_ID)
    # Updates matching no row: the statements compile and run, and change nothing.
    submissions.mark_running(engine, NO_SUCH_ID)
    submissions.transition(engine, NO_SUCH_ID, "succeeded", LIVE_STATES)
    submissions.transition(engine, NO_SUCH_ID, "failed", LIVE_STATES, error="")
    submissions.store_summary(engine, NO_SUCH_ID, {})
    _warm_holdout_writes(engine)


def _warm_holdout_writes(engine: Engine) -> None:
    """Compile the holdout job's writes without writing: the claim's insert and the outcome's are refused by
    their foreign key (no submission has this id), the updates match no row, the audit event is rolled back."""
    holdout_claims.claim(engine, NO_SUCH_ID, NO_SUCH_ID, timedelta(0))
    holdout_claims.beat(engine, NO_SUCH_ID, NO_SUCH_ID)
    holdout_claims.open_seal(engine, NO_SUCH_ID, NO_SUCH_ID, 1.0)
    with suppress(IntegrityError):
        submissions.store_holdout_once(engine, NO_SUCH_ID, {"rmse": 0.0}, "", 0.0)
    with engine.connect() as conn:  # what store_holdout_once runs after its insert, in its transaction
        transaction = conn.begin()
        try:
            conn.execute(select(submissions_table.c.team).where(submissions_table.c.id == NO_SUCH_ID)).all()
            audit.record(conn, "system", "", "holdout.scored", NO_SUCH_ID, {"metrics": []})
        finally:
            transaction.rollback()
