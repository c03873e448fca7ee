"""Fold plans against scikit-learn's splitters, and the split invariants of scikit-learn's own split tests."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from sklearn.model_selection import KFold, StratifiedKFold, TimeSeriesSplit

from service.errors import DatasetRejected, InputError
from service.vault.folds import (
    FoldPlan,
    SplitKeys,
    check_plan_feasible,
    classes_missing_from_training,
    default_plan_scheme,
    fold_assignment,
    fold_split,
    fold_splits,
    split_keys_from_frame,
)
from tests.support.frames import (
    assert_disjoint_and_covering,
    assert_same_splits,
    breast_cancer_frame,
    diabetes_frame,
    iris_frame,
    wine_frame,
)

SEEDS = [0, 1, 42, 2**31 - 1, 2**32 - 1]


@pytest.mark.parametrize("n_rows", [20, 21, 353, 442, 1001])
@pytest.mark.parametrize("folds", [2, 3, 5, 10, 20])
@pytest.mark.parametrize("seed", SEEDS)
def test_kfold_is_sklearn_kfold_index_for_index(n_rows: int, folds: int, seed: int) -> None:
    ours = fold_splits(FoldPlan("kfold", folds, seed), SplitKeys(n_rows))
    # Reference: scikit-learn KFold(n_splits, shuffle=True, random_state=seed).split
    theirs = KFold(n_splits=folds, shuffle=True, random_state=seed).split(np.zeros((n_rows, 1)))
    for split, (train, test) in zip(ours, theirs, strict=True):
        assert np.array_equal(split.train, train) and np.array_equal(split.test, test)


@pytest.mark.parametrize("n_rows", [20, 21, 150, 442])
@pytest.mark.parametrize("folds", [2, 3, 5, 10])
def test_contiguous_is_sklearn_unshuffled_kfold_index_for_index(n_rows: int, folds: int) -> None:
    ours = fold_splits(FoldPlan("contiguous", folds, 7), SplitKeys(n_rows))
    # Reference: scikit-learn KFold(n_splits) without shuffling, what cross_validate(cv=<int>) uses for regressors
    theirs = KFold(n_splits=folds).split(np.zeros((n_rows, 1)))
    for split, (train, test) in zip(ours, theirs, strict=True):
        assert np.array_equal(split.train, train) and np.array_equal(split.test, test)


def test_contiguous_folds_refuse_repeats() -> None:
    with pytest.raises(InputError, match="repeats must be 1"):
        fold_splits(FoldPlan("contiguous", 3, 0), SplitKeys(30), repeats=2)


@pytest.mark.parametrize("load", [iris_frame, wine_frame, breast_cancer_frame], ids=["iris", "wine", "breast_cancer"])
@pytest.mark.parametrize("folds", [2, 5, 10])
@pytest.mark.parametrize("seed", SEEDS)
def test_stratified_is_sklearn_stratified_kfold_index_for_index(load: object, folds: int, seed: int) -> None:
    y = load()["target"].to_numpy()  # type: ignore[operator]
    ours = fold_splits(FoldPlan("stratified", folds, seed), SplitKeys(len(y), y=y))
    # Reference: scikit-learn StratifiedKFold(n_splits, shuffle=True, random_state=seed).split
    theirs = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed).split(np.zeros((len(y), 1)), y)
    for split, (train, test) in zip(ours, theirs, strict=True):
        assert np.array_equal(split.train, train) and np.array_equal(split.test, test)


def test_stratified_with_text_labels_in_shuffled_order_matches_sklearn() -> None:
    rng = np.random.default_rng(0)
    y = rng.permutation(np.array(["van"] * 37 + ["truck"] * 21 + ["bike"] * 12, dtype=object))
    ours = fold_splits(FoldPlan("stratified", 4, 11), SplitKeys(len(y), y=y))
    theirs = StratifiedKFold(n_splits=4, shuffle=True, random_state=11).split(np.zeros((len(y), 1)), y)
    for split, (train, test) in zip(ours, theirs, strict=True):
        assert np.array_equal(split.train, train) and np.array_equal(split.test, test)
    for split in ours:  # each class spread evenly: per fold, floor or ceil of its size / 4
        counts = pd.Series(y[split.test]).value_counts()
        assert counts["van"] in (9, 10) and counts["truck"] in (5, 6) and counts["bike"] == 3


@pytest.mark.parametrize("scheme", ["kfold", "stratified", "group"])
@pytest.mark.parametrize("seed", SEEDS[:-1])
def test_folds_are_disjoint_and_cover_the_rows(scheme: str, seed: int) -> None:
    keys = _keys()
    splits = fold_splits(FoldPlan(scheme, 5, seed), keys, repeats=3)
    assert len(splits) == 15 and [s.fold for s in splits[:5]] == [0, 1, 2, 3, 4]
    assert_disjoint_and_covering(splits, keys.n_rows, repeats=3)


@pytest.mark.parametrize("scheme", ["kfold", "stratified", "group", "time"])
def test_same_plan_same_rows_same_folds(scheme: str) -> None:
    plan = FoldPlan(scheme, 5, 1234)
    assert_same_splits(fold_splits(plan, _keys()), fold_splits(plan, _keys()))
    if scheme != "time":
        other = fold_splits(FoldPlan(scheme, 5, 1235), _keys())
        assert any(not np.array_equal(a.test, b.test) for a, b in zip(fold_splits(plan, _keys()), other, strict=True))


@pytest.mark.parametrize("scheme", ["kfold", "stratified", "group"])
def test_repeat_r_uses_seed_plus_r(scheme: str) -> None:
    repeated = fold_splits(FoldPlan(scheme, 5, 100), _keys(), repeats=3)
    second = [s for s in repeated if s.repeat == 2]
    alone = fold_splits(FoldPlan(scheme, 5, 102), _keys())
    for a, b in zip(second, alone, strict=True):
        assert np.array_equal(a.train, b.train) and np.array_equal(a.test, b.test)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("folds", [2, 5, 10])
def test_group_folds_keep_groups_apart_and_balance_sizes(seed: int, folds: int) -> None:
    keys = _keys()
    assert keys.groups is not None
    splits = fold_splits(FoldPlan("group", folds, seed), keys)
    for split in splits:
        assert not set(keys.groups[split.train]) & set(keys.groups[split.test])
    sizes = [len(s.test) for s in splits]
    largest_group = pd.Series(keys.groups).value_counts().max()
    # Largest group first onto the lightest fold keeps all folds within one group's size of each other.
    assert max(sizes) - min(sizes) <= largest_group


def test_group_folds_depend_on_the_seed_when_groups_are_equal() -> None:
    groups = np.repeat(np.arange(20), 5)
    keys = SplitKeys(100, groups=groups)
    tests = {tuple(fold_splits(FoldPlan("group", 4, seed), keys)[0].test) for seed in range(5)}
    assert len(tests) > 1


@pytest.mark.parametrize("folds", [2, 3, 5, 10])
def test_time_folds_are_time_series_split_on_sorted_rows(folds: int) -> None:
    keys = _untied_keys()  # with tied times the cuts move (tests/service/vault/test_time_folds.py)
    assert keys.time is not None
    order = np.argsort(keys.time, kind="stable")
    ours = fold_splits(FoldPlan("time", folds, 0), keys)
    # Reference: scikit-learn TimeSeriesSplit(n_splits) on the rows sorted by time.
    theirs = TimeSeriesSplit(n_splits=folds).split(np.zeros((keys.n_rows, 1)))
    for split, (train, test) in zip(ours, theirs, strict=True):
        assert np.array_equal(split.train, np.sort(order[train]))
        assert np.array_equal(split.test, np.sort(order[test]))


def test_time_folds_never_train_on_the_future() -> None:
    keys = _untied_keys()
    assert keys.time is not None
    splits = fold_splits(FoldPlan("time", 5, 0), keys)
    tested = np.concatenate([s.test for s in splits])
    assert len(np.unique(tested)) == len(tested), "a row tested twice"
    first_chunk = np.setdiff1d(np.arange(keys.n_rows), tested)
    assert len(first_chunk) == keys.n_rows - 5 * (keys.n_rows // 6)  # the first chunk is never tested
    for previous, split in itertools.pairwise(splits):
        assert np.array_equal(np.union1d(previous.train, previous.test), split.train)  # chaining forward
    for split in splits:
        assert len(np.intersect1d(split.train, split.test)) == 0
        assert keys.time[split.train].max() < keys.time[split.test].min()


@pytest.mark.parametrize(("scheme", "repeats"), [("kfold", 3), ("stratified", 3), ("group", 3), ("time", 1),
                                                 ("contiguous", 1)])
@pytest.mark.parametrize("folds", [2, 5, 7])
def test_one_fold_alone_is_that_fold_of_the_whole_plan(scheme: str, repeats: int, folds: int) -> None:
    # A fold job builds only its own split; it must be the very split fold_splits lists for that cell.
    plan, keys = FoldPlan(scheme, folds, 2024), _keys()
    every = fold_splits(plan, keys, repeats=repeats)
    alone = [fold_split(plan, keys, s.repeat, s.fold, repeats=repeats) for s in every]
    assert_same_splits(alone, every)
    assert all(a.train.dtype == a.test.dtype == np.int64 for a in alone)


@pytest.mark.parametrize(("repeat", "fold"), [(0, 5), (0, -1), (2, 0), (-1, 0)])
def test_a_fold_outside_the_plan_is_refused(repeat: int, fold: int) -> None:
    with pytest.raises(InputError, match=rf"no fold \(repeat {repeat}, fold {fold}\)"):
        fold_split(FoldPlan("kfold", 5, 0), _keys(), repeat, fold, repeats=2)


def test_repeats_may_not_run_past_the_largest_seed() -> None:
    with pytest.raises(InputError) as caught:
        fold_splits(FoldPlan("kfold", 5, 2**32 - 2), _keys(), repeats=3)
    assert "exceeds 4294967295" in caught.value.detail


def test_time_folds_refuse_repeats() -> None:
    with pytest.raises(InputError) as caught:
        fold_splits(FoldPlan("time", 5, 0), _keys(), repeats=2)
    assert caught.value.problems[0].pointer == "/validation/repeats" and "got 2" in caught.value.detail


@pytest.mark.parametrize(
    ("kwargs", "text"),
    [
        ({"scheme": "kfold", "folds": 1, "seed": 0}, "folds must be between 2 and 20, got 1"),
        ({"scheme": "kfold", "folds": 21, "seed": 0}, "folds must be between 2 and 20, got 21"),
        ({"scheme": "kfold", "folds": True, "seed": 0}, "got True"),
        ({"scheme": "loo", "folds": 5, "seed": 0}, "got 'loo'"),
        ({"scheme": "kfold", "folds": 5, "seed": -1}, "got -1"),
        ({"scheme": "kfold", "folds": 5, "seed": 2**32}, "from 0 to 4294967295"),
    ],
)
def test_fold_plan_validates_its_arguments(kwargs: dict[str, object], text: str) -> None:
    with pytest.raises(InputError) as caught:
        FoldPlan(**kwargs)  # type: ignore[arg-type]
    assert text in caught.value.detail


def test_fold_plan_document_round_trip() -> None:
    plan = FoldPlan("group", 7, 99)
    assert plan.to_document() == {"scheme": "group", "folds": 7, "seed": 99}
    assert FoldPlan.from_document(plan.to_document()) == plan


def test_default_plan_scheme_follows_the_declared_columns() -> None:
    assert default_plan_scheme("regression", None, None) == "kfold"
    assert default_plan_scheme("classification", None, None) == "stratified"
    assert default_plan_scheme("classification", "depot", None) == "group"
    assert default_plan_scheme("regression", "depot", "departed") == "time"


def test_a_class_with_fewer_rows_than_folds_is_infeasible() -> None:
    y = np.array(["van"] * 30 + ["bike"] * 4)
    with pytest.raises(DatasetRejected) as caught:
        check_plan_feasible(FoldPlan("stratified", 5, 0), SplitKeys(len(y), y=y))
    assert caught.value.problems[0].pointer == "/target"
    assert "'bike' has 4" in caught.value.detail and "at least 5" in caught.value.detail
    check_plan_feasible(FoldPlan("stratified", 4, 0), SplitKeys(len(y), y=y))  # 4 folds are fine


def test_fewer_groups_than_folds_is_infeasible() -> None:
    keys = SplitKeys(40, groups=np.repeat(["a", "b", "c"], [10, 10, 20]))
    with pytest.raises(DatasetRejected) as caught:
        check_plan_feasible(FoldPlan("group", 5, 0), keys)
    assert caught.value.problems[0].pointer == "/group_column" and "got 3" in caught.value.detail


def test_too_few_rows_for_time_folds_is_infeasible() -> None:
    with pytest.raises(DatasetRejected) as caught:
        check_plan_feasible(FoldPlan("time", 5, 0), SplitKeys(5, time=np.arange(5)))
    assert "at least 6 development rows, got 5" in caught.value.detail


def test_split_keys_from_frame_reads_the_declared_columns() -> None:
    frame = _frame()
    keys = split_keys_from_frame(frame, FoldPlan("time", 5, 0), "target", "depot", "departed")
    assert keys.n_rows == 442 and keys.y is not None and keys.groups is not None and keys.time is not None
    assert np.array_equal(np.argsort(keys.time, kind="stable"), np.argsort(frame["departed"].to_numpy(), kind="stable"))
    with pytest.raises(DatasetRejected):
        split_keys_from_frame(frame, FoldPlan("group", 5, 0), "target", None, None)


def _frame() -> pd.DataFrame:
    frame = diabetes_frame()
    rng = np.random.default_rng(8)
    frame["depot"] = [f"depot-{g}" for g in rng.integers(0, 30, len(frame))]
    frame["departed"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 200, len(frame)), unit="D")
    frame["band"] = pd.qcut(frame["target"], 3, labels=["low", "mid", "high"]).astype(str)
    return frame


def _keys() -> SplitKeys:
    frame = _frame()
    return SplitKeys(
        n_rows=len(frame),
        y=frame["band"].to_numpy(),
        groups=frame["depot"].to_numpy(),
        time=frame["departed"].to_numpy().astype(np.int64),
    )


def _untied_keys() -> SplitKeys:
    # The same rows with a distinct time each, in shuffled row order.
    keys = _keys()
    return SplitKeys(keys.n_rows, y=keys.y, groups=keys.groups,
                     time=np.random.default_rng(9).permutation(keys.n_rows).astype(np.int64) * 3_600_000_000_000)


def test_classes_missing_from_training_are_those_unshuffled_kfold_leaves_out() -> None:
    # Iris (bundled with scikit-learn) sorted by class on a contiguous plan: scikit-learn's
    # KFold(3, shuffle=False), whose fold k tests exactly class k, so its training rows lack it.
    y = np.sort(iris_frame()["target"].to_numpy(), kind="stable")
    plan = FoldPlan("contiguous", 3, 0)
    found = classes_missing_from_training(plan, y, fold_assignment(plan, SplitKeys(len(y), y=y)), 0)
    # Reference: the classes of the whole target absent from each KFold training part, by hand.
    expected = [{"repeat": 0, "fold": k, "missing_classes": [str(c) for c in np.setdiff1d(np.unique(y), y[train])]}
                for k, (train, _test) in enumerate(KFold(3, shuffle=False).split(y))]
    assert found == [e for e in expected if e["missing_classes"]] == [
        {"repeat": 0, "fold": k, "missing_classes": [str(k)]} for k in range(3)]


def test_time_folds_miss_the_classes_that_only_come_later() -> None:
    # Wine (bundled with scikit-learn) sorted by class, the row order as time: TimeSeriesSplit(3)'s
    # training parts, by hand, lack the later classes.
    y = np.sort(wine_frame()["target"].to_numpy(), kind="stable")
    plan = FoldPlan("time", 3, 0)
    keys = SplitKeys(len(y), y=y, time=np.arange(len(y)))
    found = classes_missing_from_training(plan, y, fold_assignment(plan, keys), 0)
    expected = [{"repeat": 0, "fold": k, "missing_classes": [str(c) for c in np.setdiff1d(np.unique(y), y[train])]}
                for k, (train, _test) in enumerate(TimeSeriesSplit(3).split(y))]
    assert found == [e for e in expected if e["missing_classes"]] and len(found) == 2


@pytest.mark.parametrize("seed", SEEDS)
def test_stratified_training_folds_hold_every_class(seed: int) -> None:
    # Wine sorted by class: StratifiedKFold (the stratified plan's definition) trains on every class.
    y = np.sort(wine_frame()["target"].to_numpy(), kind="stable")
    plan = FoldPlan("stratified", 5, seed)
    assert classes_missing_from_training(plan, y, fold_assignment(plan, SplitKeys(len(y), y=y)), 0) == []
