"""scikit-learn's bundled datasets as CSV uploads, and the way back from a development download."""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import pandas as pd
from sklearn import datasets as skd

from service.cli.client import ServiceClient
from tests.support.frames import diabetes_frame

__all__ = ["breast_cancer_frame", "csv_bytes", "development", "diabetes_frame", "fold_indices", "register"]


def breast_cancer_frame() -> pd.DataFrame:
    """Breast cancer Wisconsin (bundled with scikit-learn): 569 rows, 30 features, binary 'target'."""
    frame = skd.load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    return frame


def csv_bytes(frame: pd.DataFrame) -> bytes:
    # float_format='%.17g' round-trips float64 exactly, so the service sees the very same numbers.
    return frame.to_csv(index=False, float_format="%.17g").encode("utf-8")


def register(steward: ServiceClient, frame: pd.DataFrame, **fields: Any) -> dict[str, Any]:
    """Register a frame through the HTTP API; return the dataset record (asserts 201)."""
    reply = steward.upload("/v1/datasets", "data.csv", csv_bytes(frame), fields)
    assert reply.status == 201, reply.text
    return reply.json()


def development(client: ServiceClient, ds_id: str) -> pd.DataFrame:
    """Download the development partition as the service serves it."""
    reply = client.get(f"/v1/datasets/{ds_id}/development")
    assert reply.status == 200, reply.text
    assert reply.headers["content-type"].startswith("text/csv")
    return pd.read_csv(io.BytesIO(reply.body), dtype={"row_id": str})


def fold_indices(client: ServiceClient, sub_id: str, dev: pd.DataFrame) -> list[tuple[np.ndarray, np.ndarray]]:
    """Turn the service's per-fold test row ids into (train, test) positions in the downloaded frame.

    For k-fold style plans every development row not tested in a fold is trained on.
    """
    reply = client.get(f"/v1/submissions/{sub_id}/folds")
    assert reply.status == 200, reply.text
    position = {rid: i for i, rid in enumerate(dev["row_id"])}
    splits = []
    everything = np.arange(len(dev))
    for fold in sorted(reply.json()["folds"], key=lambda f: (f["repeat"], f["fold"])):
        test = np.array(sorted(position[r] for r in fold["test_row_ids"]))
        splits.append((np.setdiff1d(everything, test), test))
    return splits
