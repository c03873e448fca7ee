"""Per-example holdout values of a submission's primary metric, kept inside the sealed directory.

The parameter-free ladder compares a new submission with the best so far by the standard error of
their per-example loss differences, so those values must outlive the holdout job. They are derived
from holdout rows, so they live beside the sealed file (directory 0700, files 0600) and never leave
the service.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from service.settings import Settings
from service.vault.store import dataset_paths


def _path(settings: Settings, dataset_id: str, submission_id: str) -> Path:
    return dataset_paths(settings, dataset_id).sealed_holdout.parent / "per_example" / f"{submission_id}.npz"


def save_per_example(
    settings: Settings, dataset_id: str, submission_id: str, values: Mapping[str, np.ndarray]
) -> None:
    """Write a submission's per-example values per metric atomically, readable by the owner only."""
    path = _path(settings, dataset_id, submission_id)
    path.parent.mkdir(mode=0o700, exist_ok=True)
    partial = path.with_suffix(".partial")
    fd = os.open(partial, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    arrays: dict[str, Any] = {m: np.asarray(v, dtype=np.float64) for m, v in values.items()}
    with os.fdopen(fd, "wb") as handle:
        np.savez(handle, **arrays)
    os.replace(partial, path)


def load_per_example(settings: Settings, dataset_id: str, submission_id: str, metric: str) -> np.ndarray | None:
    """Return a submission's per-example values of ``metric``, or None when none were kept."""
    path = _path(settings, dataset_id, submission_id)
    if not path.exists():
        return None
    with np.load(path) as stored:
        return np.asarray(stored[metric]) if metric in stored.files else None
