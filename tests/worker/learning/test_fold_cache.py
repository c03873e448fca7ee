"""The cached fold assignment: a fold job's split is the vault's own, whether the cache is cold, warm or damaged.

Reference: scikit-learn's KFold / StratifiedKFold on the same rows (the vault's equality with them is
checked in tests/service/vault/test_folds.py; here the cache must not change a single index).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.model_selection import KFold, StratifiedKFold, TimeSeriesSplit

from service.submission.resolved import ValidationPlan
from service.vault import store
from service.vault.folds import FoldPlan
from tests.support.worker_records import add_dataset
from worker.jobs.runtime import WorkerContext
from worker.learning.development import load_development, split_for


def _splits(ctx: WorkerContext, dataset: dict[str, object], validation: ValidationPlan,
            repeat: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    features = [str(c["name"]) for c in dataset["columns"] if c["name"] != dataset["target"]]  # type: ignore[attr-defined, index]
    _data, keys = load_development(ctx.settings, dataset, features)
    out = []
    for fold in range(validation.folds):
        split = split_for(ctx.settings, dataset, validation, keys, repeat, fold)
        out.append((split.train, split.test))
    return out


@pytest.mark.parametrize("task", ["regression", "classification"])
def test_cold_and_warm_cache_give_scikit_learns_folds(ctx: WorkerContext, task: str) -> None:
    # Diabetes (Efron et al. 2004) and breast cancer (Street et al. 1993), both bundled with scikit-learn.
    loader = load_diabetes if task == "regression" else load_breast_cancer
    frame: pd.DataFrame = loader(as_frame=True).frame
    dev, hold = frame.iloc[:-40], frame.iloc[-40:]
    scheme = "kfold" if task == "regression" else "stratified"
    dataset = add_dataset(ctx, dev, hold, "target", task, scheme=scheme, folds=5, seed=11)
    validation = ValidationPlan(scheme=scheme, folds=5, seed=11, repeats=2)
    splitter = KFold if task == "regression" else StratifiedKFold
    for repeat in (0, 1):  # repeat r uses seed + r
        expected = list(splitter(5, shuffle=True, random_state=11 + repeat).split(dev, dev["target"]))
        path = store.fold_assignment_path(ctx.settings, dataset["id"], validation.fold_plan(), repeat)
        assert not path.exists()
        cold = _splits(ctx, dataset, validation, repeat)
        assert path.is_file()  # the first job wrote it ...
        warm = _splits(ctx, dataset, validation, repeat)  # ... and every later one reads it
        for (train, test), (c_train, c_test), (w_train, w_test) in zip(expected, cold, warm, strict=True):
            assert np.array_equal(train, c_train) and np.array_equal(test, c_test)
            assert np.array_equal(train, w_train) and np.array_equal(test, w_test)


def test_a_damaged_cache_is_ignored_and_rewritten(ctx: WorkerContext) -> None:
    frame: pd.DataFrame = load_diabetes(as_frame=True).frame
    dev, hold = frame.iloc[:-40], frame.iloc[-40:]
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=4, seed=3)
    validation = ValidationPlan(scheme="kfold", folds=4, seed=3, repeats=1)
    expected = list(KFold(4, shuffle=True, random_state=3).split(dev))
    plan = FoldPlan("kfold", 4, 3)
    path = store.fold_assignment_path(ctx.settings, dataset["id"], plan, 0)
    path.parent.mkdir()
    damaged = [np.full(len(dev), 9, dtype=np.int8),          # a fold the plan does not have
               np.zeros(len(dev) - 1, dtype=np.int8),         # the wrong number of rows
               np.zeros(len(dev), dtype=np.float64)]          # the wrong type
    for bad in damaged:
        np.save(path, bad)
        assert store.load_fold_assignment(ctx.settings, dataset["id"], plan, 0, len(dev)) is None
        for (train, test), (got_train, got_test) in zip(expected, _splits(ctx, dataset, validation), strict=True):
            assert np.array_equal(train, got_train) and np.array_equal(test, got_test)
        cached = store.load_fold_assignment(ctx.settings, dataset["id"], plan, 0, len(dev))
        assert cached is not None  # rewritten with the right assignment
    path.write_bytes(b"not a numpy file")
    assert store.load_fold_assignment(ctx.settings, dataset["id"], plan, 0, len(dev)) is None


def test_a_time_assignment_cached_by_the_old_cuts_is_not_read(ctx: WorkerContext) -> None:
    # Diabetes with one of 30 departure days per row: TimeSeriesSplit's cuts on the sorted rows put
    # some days on both sides. An assignment cached from those cuts, before time folds moved their
    # cuts off tied times, must not be used.
    frame: pd.DataFrame = load_diabetes(as_frame=True).frame
    frame["day"] = np.random.default_rng(8).integers(0, 30, len(frame))
    dev, hold = frame.iloc[:-40], frame.iloc[-40:]
    dataset = {**add_dataset(ctx, dev, hold, "target", "regression", scheme="time", folds=5), "time_column": "day"}
    validation = ValidationPlan(scheme="time", folds=5, seed=0, repeats=1)
    plan = validation.fold_plan()
    order = np.argsort(dev["day"].to_numpy(), kind="stable")
    old = np.zeros(len(dev), dtype=np.int8)
    for k, (_train, test) in enumerate(TimeSeriesSplit(5).split(order)):
        old[order[test]] = k + 1
    old_path = store.fold_assignment_path(ctx.settings, dataset["id"], plan, 0).with_name("time-5-0.npy")
    old_path.parent.mkdir()
    np.save(old_path, old)
    assert store.fold_assignment_path(ctx.settings, dataset["id"], plan, 0) != old_path
    day = dev["day"].to_numpy()
    assert any(set(day[old <= k]) & set(day[old == k + 1]) for k in range(5))  # the stale cuts split days
    for train, test in _splits(ctx, dataset, validation):
        assert day[train].max() < day[test].min()
    assert store.load_fold_assignment(ctx.settings, dataset["id"], plan, 0, len(dev)) is not None
