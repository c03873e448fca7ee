"""Records for the worker's unit tests: datasets written through the vault's own writer with a holdout
the test chooses, and submissions inserted as the API would."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd

from service.catalog import load_catalog
from service.ids import new_id
from service.records import datasets, submissions
from service.records.engine import utcnow
from service.vault import store
from service.vault.fingerprint import fingerprint_frame, published_fingerprint
from service.vault.tables import column_kinds
from worker.jobs import runtime


def add_dataset(
    ctx: runtime.WorkerContext, development: pd.DataFrame, holdout: pd.DataFrame, target: str, task: str,
    *, scheme: str = "kfold", folds: int = 5, seed: int = 0, group_column: str | None = None,
    time_column: str | None = None,
) -> dict[str, Any]:
    """Store a dataset whose development and holdout rows are exactly the frames given."""
    ds_id = new_id("ds")
    dev = development.reset_index(drop=True)
    dev.insert(0, "row_id", [f"d{i + 1:06d}" for i in range(len(dev))])
    hold = holdout.reset_index(drop=True)
    # As registration records them: each column's missing values among the development rows.
    kinds = [{**c, "missing": int(dev[c["name"]].isna().sum())} for c in column_kinds(development)]
    manifest = {"columns": kinds, "numeric_columns": [c["name"] for c in kinds if c["kind"] == "numeric"],
                "target": target, "task": task}
    store.write_dataset(ctx.settings, ds_id, dev, hold, manifest)
    full = pd.concat([development, holdout], ignore_index=True)
    datasets.insert(ctx.engine, {
        "id": ds_id, "team": "fleet", "name": f"test data {ds_id}", "task": task, "target": target,
        "group_column": group_column, "time_column": time_column,
        "columns": kinds, "classes": sorted(str(c) for c in full[target].unique()) if task == "classification"
        else None, "rows_total": len(full), "rows_development": len(dev), "rows_holdout": len(hold),
        "holdout_scheme": "random", "holdout_fraction": len(hold) / len(full), "sealing_seed": "1",
        "fold_plan": {"scheme": scheme, "folds": folds, "seed": seed},
        "fingerprint": published_fingerprint(fingerprint_frame(dev), fingerprint_frame(hold),
                                             store.fingerprint_key(ctx.settings)),
        "development_fingerprint": fingerprint_frame(dev),
        "holdout_fingerprint": fingerprint_frame(hold), "created_by": "key_test", "created_at": utcnow(),
    })
    row = datasets.get_internal(ctx.engine, ds_id)
    assert row is not None
    return row


def config_document(
    dataset: dict[str, Any], estimator: str, *, params: dict[str, Any] | None = None,
    features: Sequence[str] | None = None, preprocess: Sequence[dict[str, Any]] = (),
    metrics: Sequence[str] = ("rmse",), repeats: int = 1,
) -> dict[str, Any]:
    """A normalised configuration document in the shape service.submission.config.resolve produces."""
    if features is None:
        features = [c["name"] for c in dataset["columns"] if c["name"] != dataset["target"]]
    plan = dataset["fold_plan"]
    entry = load_catalog().estimator(estimator)
    return {
        "model": {"estimator": estimator, "params": dict(params or {}), "features": list(features),
                  "preprocess": [dict(s) for s in preprocess]},
        "validation": {"scheme": plan["scheme"], "folds": plan["folds"], "seed": plan["seed"],
                       "repeats": repeats, "plan_overridden": False},
        "metrics": list(metrics), "label": "", "task": dataset["task"], "target": dataset["target"],
        "linear": bool(entry and entry.linear),
    }


def add_submission(ctx: runtime.WorkerContext, dataset: dict[str, Any], config: dict[str, Any]) -> str:
    """Insert a queued submission for ``config`` and return its id."""
    sub_id = new_id("sub")
    validation = config["validation"]
    submissions.insert(ctx.engine, {
        "id": sub_id, "team": "fleet", "dataset_id": dataset["id"], "owner_key_id": "key_test", "label": "",
        "config": config, "config_fingerprint": "f" * 64,
        "folds_total": int(validation["folds"]) * int(validation["repeats"]),
    })
    return sub_id
