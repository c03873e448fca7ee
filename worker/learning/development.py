"""Load a dataset's development rows and fold splits the way a fold job needs them.

All-numeric features come from the memory-mapped ``numeric.npy``: a fold gathers its rows once,
and features that are a run of adjacent columns (the usual case: every feature, in stored order)
are taken as a column slice, so all rows of them are a view of the map, never a copy. Features
with a categorical column come from ``development.parquet`` as a frame. The fold keys (target,
group, time) come from the parquet file too, except for a regression with no group or time
column, whose numeric target is read from the memory map.
"""

from __future__ import annotations

import logging
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

    @property
    def n_rows(self) -> int:
        """How many development rows there are."""
        return int(self.y.shape[0])

    def features_of(self, rows: np.ndarray | None = None) -> np.ndarray | pd.DataFrame:
        """Return the feature rows at ``rows`` (all when None) in the pipeline's input form."""
        if self.frame is not None:
            return self.frame if rows is None else self.frame.iloc[rows]
        assert self.matrix is not None
        columns = column_selector(self.positions)
        if rows is None:
            return np.asarray(self.matrix[:, columns])  # a view of the map when columns is a slice
        if isinstance(columns, slice):
            return gather_rows(self.matrix, rows, columns)
        return np.asarray(self.matrix[np.ix_(rows, columns)])

    def split_features(self, train: np.ndarray, test: np.ndarray) -> tuple[Any, Any]:
        """Return the feature rows of a fold's train and test indices, reading the memory map once.

        One gather of train-then-test rows, cut into two C-contiguous views: the same values as two
        ``features_of`` calls, in one pass over the map instead of two.
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
    matrix, names = store.load_numeric(settings, dataset["id"])
    missing = [f for f in features if f not in names]
    if missing:
        raise ValueError(f"features {missing} are not numeric columns of dataset {dataset['id']}; "
                         f"numeric columns: {', '.join(names)}")
    positions = tuple(names.index(f) for f in features)
    if dataset["task"] == "regression" and keys == [target] and target in names:
        y = np.array(matrix[:, names.index(target)], dtype=np.float64)
        return DevelopmentData(tuple(features), y, None, matrix, positions), pd.DataFrame({target: y}, copy=False)
    frame = store.load_development_frame(settings, dataset["id"], columns=keys)
    if len(frame) != matrix.shape[0]:
        raise ValueError(f"numeric.npy has {matrix.shape[0]} rows but development.parquet has {len(frame)}")
    y = target_values(frame[target], str(dataset["task"]))
    return DevelopmentData(tuple(features), y, None, matrix, positions), frame


def column_selector(positions: Sequence[int]) -> slice | np.ndarray:
    """Select matrix columns by a slice when they are adjacent and in order, else by their positions."""
    start = positions[0] if positions else 0
    if list(positions) == list(range(start, start + len(positions))):
        return slice(start, start + len(positions))
    return np.asarray(positions, dtype=np.intp)


def gather_rows(matrix: np.ndarray, rows: np.ndarray, columns: slice) -> np.ndarray:
    """Return ``matrix[rows, columns]`` (a new C-ordered array) for a run of adjacent columns.

    The run's values in one row are adjacent bytes, so each row's run is viewed as one opaque
    record and the records are taken with a single fancy index: a copy of a whole record per row
    where numpy's mixed (array, slice) indexing copies value by value -- 20-30 % less time for a
    million rows of 20 columns, and the same bytes.
    """
    start, stop, step = columns.indices(matrix.shape[1])
    if step != 1 or stop <= start or not matrix.flags.c_contiguous:
        return np.asarray(matrix[rows, columns])
    width = (stop - start) * matrix.itemsize
    records = np.ndarray((matrix.shape[0],), dtype=np.dtype((np.void, width)), buffer=matrix,
                         offset=start * matrix.itemsize, strides=(matrix.strides[0],))
    return records[rows].view(matrix.dtype).reshape(len(rows), stop - start)


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
