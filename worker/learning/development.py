"""Load a dataset's development rows and fold splits the way a fold job needs them.

All-numeric features come from the memory-mapped ``numeric.npy``: a job copies the rows it needs
out of the map a chunk at a time, dropping each chunk's pages of the file from its resident memory
once copied (``gather_rows``), so it holds its private copy and one chunk of the file, never both
the copy and the whole file. Features with a categorical column come from ``development.parquet``
as a frame. The fold keys (target, group, time) come from the parquet file too, except for a
regression with no group or time column, whose numeric target is read from the memory map.
"""

from __future__ import annotations

import itertools
import logging
import mmap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from service.settings import Settings
from service.submission.resolved import ValidationPlan
from service.vault import store
from service.vault.folds import (
    Split,
    check_cell,
    check_plan_feasible,
    check_repeats,
    fold_assignment,
    split_keys_from_frame,
    split_of,
)
from worker.learning.pipeline import uses_frame

log = logging.getLogger(__name__)

CHUNK_BYTES = 2 << 20  # of matrix rows copied between two releases of their pages (``gather_rows``)
# Reading a page of a file map also maps cached pages of the file around it (fault-around, a whole
# large folio), though never outside its page table's 2 MiB: a release reaches that far back too, over
# pages the chunk before released that this chunk's first reads may have mapped again.
REMAPPED_BYTES = 2 << 20
MAX_RUNS = 8  # ascending runs of rows that ``gather_rows`` reads together in file order


def column_kinds(dataset: Mapping[str, Any]) -> dict[str, str]:
    """Map each column of a dataset record to its kind."""
    return {str(c["name"]): str(c["kind"]) for c in dataset["columns"]}


def model_frame(frame: pd.DataFrame, features: Sequence[str], kinds: Mapping[str, str]) -> pd.DataFrame:
    """Select the features; numeric ones as float64 (nullable NA becomes NaN) like ``numeric.npy``."""
    out = frame.loc[:, list(features)].copy()
    for name in features:
        if kinds[name] == "numeric":
            out[name] = out[name].astype("float64")
    return out


def model_matrix(frame: pd.DataFrame, features: Sequence[str]) -> np.ndarray:
    """Select numeric features of a frame as the float64 matrix ``numeric.npy`` would hold."""
    return frame.loc[:, list(features)].astype("float64").to_numpy(dtype=np.float64)


def target_values(series: pd.Series, task: str) -> np.ndarray:
    """Return the target as numpy: float64 for regression, the labels as they are for classification."""
    if task == "regression":
        return series.astype("float64").to_numpy(dtype=np.float64)
    return np.asarray(series.to_numpy())


@dataclass(frozen=True)
class DevelopmentData:
    """The development rows of one dataset, restricted to a configuration's features."""

    features: tuple[str, ...]
    y: np.ndarray
    frame: pd.DataFrame | None  # set when any feature is categorical
    matrix: np.ndarray | None  # the memory map of numeric.npy otherwise
    positions: tuple[int, ...]  # feature positions in the memory map's columns
    # Every feature and target value is finite, as the registration found when it wrote numeric.npy
    # (``service.vault.store.finite_columns``); False when nobody checked.
    finite: bool = False

    @property
    def n_rows(self) -> int:
        """How many development rows there are."""
        return int(self.y.shape[0])

    def features_of(self, rows: np.ndarray | None = None) -> np.ndarray | pd.DataFrame:
        """Return the feature rows at ``rows`` in the pipeline's input form, as a private copy.

        None: every row, as a read-only view of the map when the features are adjacent columns (for
        a look that copies nothing); ``copied_features`` gives them to a fit.
        """
        if self.frame is not None:
            return self.frame if rows is None else self.frame.iloc[rows]
        assert self.matrix is not None
        columns = column_selector(self.positions)
        if rows is None:
            return np.asarray(self.matrix[:, columns])  # a view of the map when columns is a slice
        return gather_rows(self.matrix, rows, columns)

    def copied_features(self) -> np.ndarray | pd.DataFrame:
        """Return every row's features for a fit that may overwrite them (``fit_in_place``): a private copy."""
        if self.frame is not None:
            return self.frame
        assert self.matrix is not None
        return gather_rows(self.matrix, None, column_selector(self.positions))

    def split_features(self, train: np.ndarray, test: np.ndarray) -> tuple[Any, Any]:
        """Return the feature rows of a fold's train and test indices, gathered together.

        One gather of train-then-test rows, cut into two C-contiguous views of one array: the same
        values as two ``features_of`` calls.
        """
        if self.frame is not None:
            return self.frame.iloc[train], self.frame.iloc[test]
        both = self.features_of(np.concatenate([train, test]))
        return both[: len(train)], both[len(train):]

    def target_of(self, rows: np.ndarray | None = None) -> np.ndarray:
        """Return the target at ``rows`` (all when None)."""
        return self.y if rows is None else self.y[rows]


def load_development(
    settings: Settings, dataset: Mapping[str, Any], features: Sequence[str]
) -> tuple[DevelopmentData, pd.DataFrame]:
    """Load the features and target of the development rows; also return the fold-key frame.

    A regression on numeric features with no group or time column reads nothing but the memory
    map: its target is one of the map's columns (the same float64 values ``target_values`` makes
    of the parquet column), so the job never builds a pandas frame from the parquet file -- in a
    freshly forked work horse that alone cost more than a 1,000-row fit.
    """
    kinds = column_kinds(dataset)
    target = str(dataset["target"])
    keys = [c for c in (target, dataset.get("group_column"), dataset.get("time_column")) if c]
    if uses_frame(features, kinds):
        frame = store.load_development_frame(settings, dataset["id"], columns=list(dict.fromkeys([*keys, *features])))
        y = target_values(frame[target], str(dataset["task"]))
        return DevelopmentData(tuple(features), y, model_frame(frame, features, kinds), None, ()), frame.loc[:, keys]
    numeric = store.load_numeric(settings, dataset["id"])
    matrix, names = numeric.matrix, numeric.columns
    missing = [f for f in features if f not in names]
    if missing:
        raise ValueError(f"features {missing} are not numeric columns of dataset {dataset['id']}; "
                         f"numeric columns: {', '.join(names)}")
    positions = tuple(names.index(f) for f in features)
    if dataset["task"] == "regression" and keys == [target] and target in names:
        # Gathered, not read whole: that would map every page of the file beside what a fold process
        # kept of its previous fold's memory (``worker.process.fold_process``).
        column = names.index(target)
        y = gather_rows(matrix, None, slice(column, column + 1)).ravel()
        finite = numeric.finite.issuperset([*features, target])
        return (DevelopmentData(tuple(features), y, None, matrix, positions, finite),
                pd.DataFrame({target: y}, copy=False))
    frame = store.load_development_frame(settings, dataset["id"], columns=keys)
    if len(frame) != matrix.shape[0]:
        raise ValueError(f"numeric.npy has {matrix.shape[0]} rows but development.parquet has {len(frame)}")
    y = target_values(frame[target], str(dataset["task"]))
    # Labels that are not floats cannot be NaN or infinite; float ones are a numeric column of the manifest.
    finite = numeric.finite.issuperset(features) and (y.dtype.kind != "f" or target in numeric.finite)
    return DevelopmentData(tuple(features), y, None, matrix, positions, finite), frame


def column_selector(positions: Sequence[int]) -> slice | np.ndarray:
    """Select matrix columns by a slice when they are adjacent and in order, else by their positions."""
    start = positions[0] if positions else 0
    if list(positions) == list(range(start, start + len(positions))):
        return slice(start, start + len(positions))
    return np.asarray(positions, dtype=np.intp)


def gather_rows(matrix: np.ndarray, rows: np.ndarray | None, columns: slice | np.ndarray) -> np.ndarray:
    """Return ``matrix[rows, columns]`` (every row when ``rows`` is None) as a new C-ordered array.

    Copied ``CHUNK_BYTES`` of matrix rows at a time, each chunk's pages of a memory map then dropped
    from this process's resident memory (``release_rows``): a job holds its private copy and about
    one chunk of the file, not the copy and every page of the file it touched. Rows that are a few
    ascending runs (every row; a fold's train-then-test rows) are read in file order, every run's
    rows of one block of the file at a time, so each page is mapped once; other rows in their order.
    A run of adjacent columns is taken as one opaque record per row: numpy's mixed (array, slice)
    indexing copies value by value, 20-30 % slower for a million rows of 20 columns.
    """
    count, size = (matrix.shape[0] if rows is None else len(rows)), matrix.shape[0]
    out = np.empty((count, np.arange(matrix.shape[1])[columns].size), dtype=matrix.dtype)
    records = _records(matrix, columns)

    def take(part: np.ndarray) -> np.ndarray:
        if records is not None:
            return records[part].view(matrix.dtype).reshape(len(part), out.shape[1])
        return matrix[part, columns] if isinstance(columns, slice) else matrix[np.ix_(part, columns)]

    step = max(1, CHUNK_BYTES // max(1, matrix.strides[0]))
    if rows is None:
        for low in range(0, count, step):
            out[low:low + step] = matrix[low:low + step][:, columns]
            release_rows(matrix, low, low + step)
        return out
    bounds = np.concatenate([[0], np.flatnonzero(np.diff(rows) < 0) + 1, [count]])  # of the ascending runs
    if count > 0 and len(bounds) <= MAX_RUNS + 1 and rows[bounds[:-1]].min() >= 0 and rows[bounds[1:] - 1].max() < size:
        for low in range(0, size, step):
            for first, stop in itertools.pairwise(bounds):
                i, j = first + np.searchsorted(rows[first:stop], [low, low + step])
                out[i:j] = take(rows[i:j])
            release_rows(matrix, low, low + step)
        return out
    for start in range(0, count, step):
        part = rows[start:start + step]
        out[start:start + len(part)] = take(part)
        release_rows(matrix, int(part.min()), int(part.max()) + 1)
    return out


def _records(matrix: np.ndarray, columns: slice | np.ndarray) -> np.ndarray | None:
    """View each row's run of adjacent ``columns`` as one opaque record, or None when they are no such run."""
    if not isinstance(columns, slice) or not matrix.flags.c_contiguous:
        return None
    start, stop, step = columns.indices(matrix.shape[1])
    if step != 1 or stop <= start:
        return None
    width = (stop - start) * matrix.itemsize
    return np.ndarray((matrix.shape[0],), dtype=np.dtype((np.void, width)), buffer=matrix,
                      offset=start * matrix.itemsize, strides=(matrix.strides[0],))


def release_rows(matrix: np.ndarray, first: int, stop: int) -> None:
    """Drop the pages holding rows [first, stop) of a read-only memory map from this process's resident memory.

    ``MADV_DONTNEED`` on a read-only shared file mapping only unmaps the pages: the file's page cache
    keeps them, and reading those rows again maps them again, unchanged. Anything else -- an array
    in memory, a writeable or copy-on-write map -- is left alone.
    """
    if not isinstance(matrix, np.memmap) or matrix.mode != "r" or stop <= first:
        return
    mapping: Any = matrix
    while isinstance(mapping, np.ndarray):
        mapping = mapping.base
    if not isinstance(mapping, mmap.mmap):
        return
    offset = matrix.ctypes.data - np.frombuffer(mapping, dtype=np.uint8).ctypes.data  # of row 0 in the mapping
    low = max(0, offset + max(0, first) * matrix.strides[0] - REMAPPED_BYTES)
    high = offset + min(stop, matrix.shape[0]) * matrix.strides[0]
    low -= low % mmap.PAGESIZE
    if high > low:
        mapping.madvise(mmap.MADV_DONTNEED, low, high - low)


def split_for(
    settings: Settings, dataset: Mapping[str, Any], validation: ValidationPlan, key_frame: pd.DataFrame,
    repeat: int, fold: int,
) -> Split:
    """Return the one (repeat, fold) split of the configuration, as the vault's fold plan defines it.

    The plan's fold of every row is computed once per dataset and repeat and cached beside the
    development files: every fold job of every submission on the dataset cuts its split from the
    same assignment (at a million rows, computing it costs a fold job ~30 ms; reading it ~1 ms).
    The result equals ``fold_split`` on the same rows (a test checks).
    """
    plan = validation.fold_plan()
    repeats = validation.repeats
    check_repeats(plan, repeats)
    check_cell(plan, repeats, repeat, fold)
    assignment = store.load_fold_assignment(settings, str(dataset["id"]), plan, repeat, len(key_frame))
    if assignment is None:
        keys = split_keys_from_frame(
            key_frame, plan, dataset["target"], dataset.get("group_column"), dataset.get("time_column")
        )
        check_plan_feasible(plan, keys)  # repeats and cell were checked above
        assignment = fold_assignment(plan, keys, repeat)
        try:
            store.save_fold_assignment(settings, str(dataset["id"]), plan, repeat, assignment)
        except OSError as exc:  # a read-only data volume: every job computes its own, as before
            log.warning("could not cache the fold assignment of %s: %s", dataset["id"], exc)
    return split_of(plan, assignment, repeat, fold)
