"""Per-example holdout values of a submission's primary metric, kept inside the sealed directory.

The parameter-free ladder compares a new submission with the best so far by the standard error of
their per-example loss differences, so those values must outlive the holdout job. They are derived
from holdout rows, so they live beside the sealed file (directory 0700, files 0600) and never leave
the service. A worker without the shared disk sends them to the API when it writes them and reads the
API's copy (``worker.jobs.runtime.publish_per_example``, ``per_example_source``), over the internal
endpoint only workers hold the secret of, and keeps no copy of them on its disk.
A file that cannot be read raises ``DamagedLosses``, whose message names the submission and the error
class only, so the verdict job can fail the submission plainly instead of retrying forever.
"""

from __future__ import annotations

import io
import os
import tempfile
import zipfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from service.settings import Settings
from service.vault.store import per_example_path
from worker.jobs import runtime


class DamagedLosses(Exception):
    """A kept per-example file exists but cannot be read."""


def _path(settings: Settings, dataset_id: str, submission_id: str) -> Path:
    return per_example_path(settings, dataset_id, submission_id)


def _kept(settings: Settings, dataset_id: str, submission_id: str) -> Path | io.BytesIO | None:
    """The kept file, or the API's copy of it in memory on a worker without the shared disk; None: none kept."""
    return runtime.per_example_source(dataset_id, submission_id, _path(settings, dataset_id, submission_id))


def save_per_example(
    settings: Settings, dataset_id: str, submission_id: str, values: Mapping[str, np.ndarray]
) -> None:
    """Write a submission's per-example values per metric atomically, readable by the owner only.

    Written under a unique temporary name in the same sealed directory (mode 0600 from creation),
    then renamed over the final name, so two writers never share a partial file and a reader sees
    one whole file or none.
    """
    path = _path(settings, dataset_id, submission_id)
    path.parent.mkdir(mode=0o700, exist_ok=True)
    fd, partial = tempfile.mkstemp(prefix=f".{submission_id}-", suffix=".partial", dir=path.parent)
    arrays: dict[str, Any] = {m: np.asarray(v) if m in ROW_KEYS else np.asarray(v, dtype=np.float64)
                              for m, v in values.items()}
    try:
        os.fchmod(fd, 0o600)
        with os.fdopen(fd, "wb") as handle:
            np.savez(handle, **arrays)
        os.replace(partial, path)
    except BaseException:
        Path(partial).unlink(missing_ok=True)
        raise
    runtime.publish_per_example(dataset_id, submission_id, path)  # to the API, for workers without the disk


# Keys of the arrays that score a metric on any subset of the sealed rows (no metric is named so).
ROW_KEYS = ("_y", "_pred", "_proba", "_labels")


def scoring_rows(y: Any, pred: Any, proba: Any, labels: Any) -> dict[str, np.ndarray]:
    """Return the arrays that score any metric on a subset of rows: targets, predictions, classes.

    Labels that numpy can only hold as objects are stored as text, all of them the same way, so the
    file never needs pickle and y, predictions and classes still compare equal.
    """
    arrays = {"_y": y, "_pred": pred, "_proba": proba, "_labels": labels}
    kept = {k: np.asarray(v) for k, v in arrays.items() if v is not None}
    if any(a.dtype == object for a in kept.values()):
        kept = {k: (a.astype(str) if k != "_proba" else a.astype(np.float64)) for k, a in kept.items()}
    return kept


def load_scoring_rows(settings: Settings, dataset_id: str, submission_id: str) -> dict[str, np.ndarray] | None:
    """Return a submission's ``scoring_rows`` arrays, or None when none were kept.

    Raises ``DamagedLosses`` when the file is there but cannot be read.
    """
    source = _kept(settings, dataset_id, submission_id)
    if source is None:
        return None
    try:
        with np.load(source, allow_pickle=False) as stored:
            if "_y" not in stored.files:
                return None
            return {k: np.asarray(stored[k]) for k in ROW_KEYS if k in stored.files}
    except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise DamagedLosses(f"the per-example holdout losses kept for submission {submission_id} cannot be read "
                            f"({type(exc).__name__})") from exc


def load_per_example(settings: Settings, dataset_id: str, submission_id: str, metric: str) -> np.ndarray | None:
    """Return a submission's per-example values of ``metric``, or None when none were kept.

    Raises ``DamagedLosses`` when the file is there but cannot be read.
    """
    source = _kept(settings, dataset_id, submission_id)
    if source is None:
        return None
    try:
        stored = np.load(source, allow_pickle=False)
        if not isinstance(stored, np.lib.npyio.NpzFile):
            raise ValueError("not an archive of arrays")
        with stored:
            return np.asarray(stored[metric], dtype=np.float64) if metric in stored.files else None
    except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise DamagedLosses(f"the per-example holdout losses kept for submission {submission_id} cannot be read "
                            f"({type(exc).__name__})") from exc
