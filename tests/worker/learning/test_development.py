"""A fold's feature rows come out of the memory map exactly as the development frame holds them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

from tests.support.worker_records import add_dataset
from worker.jobs.runtime import WorkerContext
from worker.learning.development import column_selector, gather_rows, load_development


@pytest.mark.parametrize("columns", [slice(0, 11), slice(2, 7), slice(10, 11), slice(0, 10), slice(3, 3)])
def test_gather_rows_copies_what_numpy_indexing_gives(tmp_path: Path, columns: slice) -> None:
    # Reference: numpy's own indexing of the same memory map (repeated and unsorted rows included).
    rng = np.random.default_rng(4)
    np.save(tmp_path / "m.npy", rng.standard_normal((500, 11)))
    matrix = np.load(tmp_path / "m.npy", mmap_mode="r")
    rows = np.concatenate([rng.integers(0, 500, 200), [499, 0, 0]])
    got = gather_rows(matrix, rows, columns)
    assert np.array_equal(got, matrix[rows, columns])
    assert got.shape == matrix[rows, columns].shape and got.flags.c_contiguous and got.flags.writeable


def test_split_features_are_the_development_rows_of_the_frame(ctx: WorkerContext) -> None:
    # Reference: the diabetes frame itself (Efron et al. 2004, bundled with scikit-learn).
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    features = ["bmi", "bp", "s1", "s2"]  # a run of adjacent columns
    data, _keys = load_development(ctx.settings, dataset, features)
    assert isinstance(column_selector(data.positions), slice)  # so the rows are gathered as records
    train, test = np.arange(0, 400, 3), np.arange(1, 400, 3)
    X_train, X_test = data.split_features(train, test)
    expected = frame.iloc[:400][features].to_numpy()
    assert np.array_equal(X_train, expected[train]) and np.array_equal(X_test, expected[test])
