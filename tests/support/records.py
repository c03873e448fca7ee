"""Records for the core's unit tests: a records DB on disk and dataset rows as registration stores them.

The reconciler, intake and board read only the records, never a dataset's files, so a dataset here is
its row alone: column kinds and fingerprints computed by the vault's own functions from a real frame,
and a development/holdout split by row position.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import Engine

from service.ids import new_id
from service.ops.data_identity import claim
from service.records import datasets
from service.records.engine import make_engine, utcnow
from service.records.schema import upgrade
from service.settings import Settings
from service.vault.fingerprint import fingerprint_frame, published_fingerprint
from service.vault.tables import column_kinds

_KEY = bytes(range(32))  # a server's fingerprint key; any 32 bytes


def upgraded_engine(settings: Settings) -> Engine:
    """Open the records DB ``settings`` name, upgraded to this code's schema and with the data dir claimed (what
    `sealfold db upgrade` does)."""
    engine = make_engine(settings)
    upgrade(engine)
    claim(engine, settings.data_dir)
    return engine


def records_engine(data_dir: Path) -> Engine:
    """Open a fresh SQLite records DB under ``data_dir`` with the schema created."""
    return upgraded_engine(Settings.load({"data_dir": data_dir, "database_url": ""}, environ={}))


def add_dataset_row(
    engine: Engine, frame: pd.DataFrame, target: str, task: str, *, team: str = "fleet", holdout_rows: int = 42,
    folds: int = 5, seed: int = 0, created_by: str = "key_steward",
) -> dict[str, Any]:
    """Insert the row of a dataset whose last ``holdout_rows`` rows are its holdout; return the internal row."""
    ds_id = new_id("ds")
    dev, hold = frame.iloc[:-holdout_rows], frame.iloc[-holdout_rows:]
    datasets.insert(engine, {
        "id": ds_id, "team": team, "name": "test data", "task": task, "target": target,
        "columns": column_kinds(frame),
        "classes": sorted(str(c) for c in frame[target].unique()) if task == "classification" else None,
        "rows_total": len(frame), "rows_development": len(dev), "rows_holdout": len(hold),
        "holdout_scheme": "random", "holdout_fraction": len(hold) / len(frame), "sealing_seed": "1",
        # The plan registration gives such a dataset: stratified folds for classification.
        "fold_plan": {"scheme": "stratified" if task == "classification" else "kfold", "folds": folds, "seed": seed},
        "fingerprint": published_fingerprint(fingerprint_frame(dev), fingerprint_frame(hold), _KEY),
        "development_fingerprint": fingerprint_frame(dev),
        "holdout_fingerprint": fingerprint_frame(hold), "created_by": created_by, "created_at": utcnow(),
    })
    row = datasets.get_internal(engine, ds_id)
    assert row is not None
    return row
