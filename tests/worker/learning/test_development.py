"""A fold's feature rows come out of the memory map exactly as the development frame holds them."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

from tests.support.worker_records import add_dataset
from worker.jobs.runtime import WorkerContext
from worker.learning import development
from worker.learning.development import column_selector, gather_rows, load_development

COLUMNS = [slice(0, 11), slice(2, 7), slice(10, 11), slice(0, 10), slice(3, 3), slice(1, 9, 3),
           np.array([4, 0, 7]), np.array([], dtype=np.intp)]


@pytest.mark.parametrize("chunk_bytes", [88 * 7, 1 << 20])  # 7 rows a chunk (a partial last one), and one chunk
@pytest.mark.parametrize("columns", COLUMNS)
def test_gather_rows_copies_what_numpy_indexing_gives(
    tmp_path: Path, columns: slice | np.ndarray, chunk_bytes: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Reference: numpy's own indexing of the same memory map (repeated, unsorted and negative rows included).
    monkeypatch.setattr(development, "CHUNK_BYTES", chunk_bytes)
    rng = np.random.default_rng(4)
    np.save(tmp_path / "m.npy", rng.standard_normal((500, 11)))
    matrix = np.load(tmp_path / "m.npy", mmap_mode="r")
    index = (lambda r: np.ix_(r, columns)) if isinstance(columns, np.ndarray) else (lambda r: (r, columns))
    for rows in (np.concatenate([rng.integers(0, 500, 200), [499, 0, 0, -1]]), np.arange(500), np.arange(0),
                 np.concatenate([np.arange(3, 500, 4), np.arange(0, 500, 3)]), np.array([-3, -1, 2, 2, 9]),
                 np.array([3, 40, 41, 400]), np.array([7])):  # chunks without a row of them too
        got = gather_rows(matrix, rows, columns)
        expected = matrix[index(rows)]
        assert np.array_equal(got, expected) and got.shape == expected.shape
        assert got.flags.c_contiguous and got.flags.writeable
        assert np.array_equal(gather_rows(np.array(matrix), rows, columns), expected)  # an array in memory
    every = gather_rows(matrix, None, columns)
    assert np.array_equal(every, matrix[index(np.arange(500))]) and every.flags.c_contiguous
    if every.size:  # numpy checks no row index when it takes no column
        with pytest.raises(IndexError):
            gather_rows(matrix, np.array([1, 500]), columns)  # as numpy's indexing


def test_gather_rows_leaves_no_page_of_the_map_resident(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the kernel's count of this process's resident pages of the file (/proc/self/smaps).
    monkeypatch.setattr(development, "CHUNK_BYTES", 64 << 10)
    np.save(tmp_path / "m.npy", np.random.default_rng(5).standard_normal((100_000, 21)))  # 16 MiB
    matrix = np.load(tmp_path / "m.npy", mmap_mode="r")
    rows = np.concatenate([np.arange(0, 100_000, 5), np.arange(1, 100_000, 5)])
    for gathered in (rows, None, np.random.default_rng(6).permutation(100_000)[:30_000]):
        gather_rows(matrix, gathered, slice(0, 20))
        assert resident_kib(tmp_path / "m.npy") <= 128  # at most the last chunk's pages
    untouched = np.array(matrix[:, 20])  # numpy's own copy leaves them mapped: the check can fail
    assert resident_kib(tmp_path / "m.npy") > 15_000 and len(untouched) == 100_000


def test_gather_rows_keeps_what_a_copy_on_write_map_changed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the value written into the map; releasing its page would read the file's value again.
    monkeypatch.setattr(development, "CHUNK_BYTES", 4096)
    np.save(tmp_path / "m.npy", np.zeros((10_000, 4)))
    matrix = np.load(tmp_path / "m.npy", mmap_mode="c")
    matrix[5_000, 1] = 7.0
    for _ in range(2):
        assert gather_rows(matrix, np.arange(10_000), slice(0, 4))[5_000, 1] == 7.0
        assert gather_rows(matrix[:, 1:], None, slice(0, 1))[5_000, 0] == 7.0  # a read-only view too
        matrix = matrix[:, :]
        matrix.flags.writeable = False


def resident_kib(path: Path) -> int:
    """The resident size of this process's mappings of ``path``, from /proc/self/smaps."""
    total, inside = 0, False
    for line in Path("/proc/self/smaps").read_text().splitlines():
        if re.match(r"[0-9a-f]+-[0-9a-f]+ ", line):  # a mapping's first line ends with its file
            inside = line.rstrip().endswith(str(path))
        elif inside and line.startswith("Rss:"):
            total += int(line.split()[1])
    return total


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
