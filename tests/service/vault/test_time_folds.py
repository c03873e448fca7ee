"""Time folds on tied times: every timestamp on one side of each cut, the cuts next to scikit-learn's.

Reference: scikit-learn's ``TimeSeriesSplit`` on the time-sorted rows. Without ties the plan is
exactly its folds (tests/service/vault/test_folds.py); with ties each of its cuts moves to the
nearest position where the time changes.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn.model_selection import TimeSeriesSplit

from service.errors import DatasetRejected
from service.vault.folds import FoldPlan, SplitKeys, check_plan_feasible, fold_splits
from tests.support.frames import diabetes_frame


def _tied_keys(days: int) -> SplitKeys:
    # Diabetes (bundled with scikit-learn), each of its 442 rows given one of ``days`` departure days.
    frame = diabetes_frame()
    day = np.random.default_rng(8).integers(0, days, len(frame))
    return SplitKeys(len(frame), y=frame["target"].to_numpy(), time=day.astype(np.int64) * 86_400_000_000_000)


def _times_on_both_sides(time: np.ndarray, train: np.ndarray, test: np.ndarray) -> int:
    return len(np.intersect1d(time[train], time[test]))


@pytest.mark.parametrize("days", [200, 30, 12])
@pytest.mark.parametrize("folds", [2, 3, 5, 10])
def test_no_time_lies_on_both_sides_of_a_fold(days: int, folds: int) -> None:
    keys = _tied_keys(days)
    assert keys.time is not None
    order = np.argsort(keys.time, kind="stable")
    reference = list(TimeSeriesSplit(n_splits=folds).split(np.zeros((keys.n_rows, 1))))
    # TimeSeriesSplit on the sorted rows cuts through tied times: the defect this plan avoids.
    assert sum(_times_on_both_sides(keys.time, order[tr], order[te]) for tr, te in reference) > 0
    splits = fold_splits(FoldPlan("time", folds, 0), keys)
    for split in splits:
        assert len(split.test) > 0 and _times_on_both_sides(keys.time, split.train, split.test) == 0
        assert keys.time[split.train].max() < keys.time[split.test].min()  # never trains on the future
    for previous, split in itertools.pairwise(splits):
        assert np.array_equal(np.union1d(previous.train, previous.test), split.train)  # chaining forward
    tested = np.concatenate([s.test for s in splits])
    assert len(np.unique(tested)) == len(tested)


@pytest.mark.parametrize("folds", [2, 3, 5, 10])
def test_each_cut_moves_to_the_nearest_change_of_time(folds: int) -> None:
    keys = _tied_keys(200)
    assert keys.time is not None
    ordered = np.sort(keys.time)
    changes = np.flatnonzero(np.diff(ordered) > 0) + 1
    splits = fold_splits(FoldPlan("time", folds, 0), keys)
    reference = TimeSeriesSplit(n_splits=folds).split(np.zeros((keys.n_rows, 1)))
    for split, (_train, test) in zip(splits, reference, strict=True):
        # By hand: the position where the sorted time changes nearest to TimeSeriesSplit's cut
        # (its first test row), the earlier one at equal distance.
        wanted = int(test[0])
        nearest = int(changes[np.argmin(np.abs(changes - wanted))])
        assert len(split.train) == nearest  # the test rows start at the cut
        moved = abs(nearest - wanted)
        assert moved <= max(np.sum(ordered == ordered[wanted]), np.sum(ordered == ordered[wanted - 1]))


def test_fewer_distinct_times_than_chunks_is_infeasible() -> None:
    time = np.repeat(np.arange(5), 20)
    with pytest.raises(DatasetRejected) as caught:
        check_plan_feasible(FoldPlan("time", 5, 0), SplitKeys(100, time=time))
    assert "at least 6 distinct times in the development rows, got 5" in caught.value.detail
    assert caught.value.problems[0].pointer == "/folds"
    check_plan_feasible(FoldPlan("time", 4, 0), SplitKeys(100, time=time))
    splits = fold_splits(FoldPlan("time", 4, 0), SplitKeys(100, time=time))
    assert [len(s.test) for s in splits] == [20, 20, 20, 20]  # one day per chunk
