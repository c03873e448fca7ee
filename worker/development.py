"""Load a dataset's development rows and fold splits the way a fold job needs them.

All-numeric features come from the memory-mapped ``numeric.npy`` (only the rows and columns a fold
uses are read); features with a categorical column come from ``development.parquet`` as a frame.
The target and the fold keys (target, group, time) always come from the parquet file.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from service.settings import Settings
from service.vault import store
from service.vault.folds import FoldPlan, Split, fold_splits, split_keys_from_frame
from worker.pipeline import uses_frame


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
        index = np.arange(self.n_rows) if rows is None else rows
        return np.asarray(self.matrix[np.ix_(index, np.asarray(self.positions, dtype=np.intp))], dtype=np.float64)

    def target_of(self, rows: np.ndarray | None = None) -> np.ndarray:
        """Return the target at ``rows`` (all when None)."""
        return self.y if rows is None else self.y[rows]


def load_development(
    settings: Settings, dataset: Mapping[str, Any], features: Sequence[str]
) -> tuple[DevelopmentData, pd.DataFrame]:
    """Load the features and target of the development rows; also return the fold-key frame."""
    kinds = column_kinds(dataset)
    target = str(dataset["target"])
    keys = [c for c in (target, dataset.get("group_column"), dataset.get("time_column")) if c]
    by_frame = uses_frame(features, kinds)
    wanted = list(dict.fromkeys([*keys, *(features if by_frame else [])]))
    frame = store.load_development_frame(settings, dataset["id"], columns=wanted)
    y = target_values(frame[target], str(dataset["task"]))
    if by_frame:
        data = DevelopmentData(tuple(features), y, model_frame(frame, features, kinds), None, ())
    else:
        matrix, names = store.load_numeric(settings, dataset["id"])
        missing = [f for f in features if f not in names]
        if missing:
            raise ValueError(f"features {missing} are not numeric columns of dataset {dataset['id']}; "
                             f"numeric columns: {', '.join(names)}")
        data = DevelopmentData(tuple(features), y, None, matrix, tuple(names.index(f) for f in features))
    if data.n_rows != len(frame):
        raise ValueError(f"numeric.npy has {data.n_rows} rows but development.parquet has {len(frame)}")
    return data, frame.loc[:, keys]


def fold_plan(validation: Mapping[str, Any]) -> FoldPlan:
    """Return the fold plan of a configuration's ``validation`` part."""
    return FoldPlan(scheme=str(validation["scheme"]), folds=int(validation["folds"]), seed=int(validation["seed"]))


def all_splits(
    dataset: Mapping[str, Any], validation: Mapping[str, Any], key_frame: pd.DataFrame
) -> list[Split]:
    """Return every (repeat, fold) split of the configuration, as the vault defines them."""
    plan = fold_plan(validation)
    keys = split_keys_from_frame(
        key_frame, plan, dataset["target"], dataset.get("group_column"), dataset.get("time_column")
    )
    return fold_splits(plan, keys, int(validation.get("repeats", 1)))


def find_split(splits: Sequence[Split], repeat: int, fold: int) -> Split:
    """Pick one split, or say which exist."""
    for split in splits:
        if split.repeat == repeat and split.fold == fold:
            return split
    cells = ", ".join(f"({s.repeat}, {s.fold})" for s in splits)
    raise ValueError(f"no fold (repeat {repeat}, fold {fold}) in this plan; it has {cells}")
