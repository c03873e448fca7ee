"""Sealing: which rows are held out, and that each scheme keeps its promise."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import ks_2samp
from sklearn.model_selection import train_test_split

from service.errors import DatasetRejected
from service.vault.sealing import (
    default_fraction,
    default_scheme,
    holdout_count,
    holdout_mask,
    stratified_counts,
    target_bins,
)
from tests.support.frames import breast_cancer_frame, diabetes_frame, iris_frame, wine_frame

SEEDS = [0, 1, 2**40 + 17, 2**63 - 1]


def _mask(df: pd.DataFrame, scheme: str, fraction: float = 0.2, seed: int = 7, **columns: str | None) -> np.ndarray:
    return holdout_mask(
        df, scheme, fraction, seed, target=columns.get("target"),
        group_column=columns.get("group_column"), time_column=columns.get("time_column"),
    )


@pytest.mark.parametrize(
    ("n_rows", "fraction"), [(99_999, 0.2), (100_000, 0.1), (999_999, 0.1), (1_000_000, 0.01), (50, 0.2)]
)
def test_default_fraction_by_size(n_rows: int, fraction: float) -> None:
    # 20 % under 100k, 10 % under 1M, 1 % from 1M rows: common practice (REFERENCES.md, "Split sizes").
    assert default_fraction(n_rows) == fraction


def test_default_scheme_follows_the_declared_columns() -> None:
    assert default_scheme("regression", None, None) == "stratified"  # on target quantile bins
    assert default_scheme("classification", None, None) == "stratified"
    assert default_scheme("classification", "depot", None) == "group"
    assert default_scheme("regression", "depot", "departed") == "time"


@pytest.mark.parametrize("n_rows", [50, 101, 442, 569])
@pytest.mark.parametrize("fraction", [0.01, 0.1, 0.2, 0.25, 0.5])
def test_holdout_size_is_train_test_splits(n_rows: int, fraction: float) -> None:
    # Reference: scikit-learn's train_test_split rounds the test share up (ceil(test_size * n)).
    _, test = train_test_split(np.arange(n_rows), test_size=fraction, random_state=0)
    assert holdout_count(n_rows, fraction) == len(test)
    frame = pd.DataFrame({"x": np.arange(n_rows)})
    assert _mask(frame, "random", fraction).sum() == len(test)


def test_random_holdout_same_seed_same_rows_other_seed_other_rows() -> None:
    frame = diabetes_frame()
    masks = [_mask(frame, "random", seed=seed) for seed in SEEDS]
    for seed, mask in zip(SEEDS, masks, strict=True):
        assert np.array_equal(mask, _mask(frame, "random", seed=seed))
        assert mask.sum() == math.ceil(0.2 * 442)
    assert len({m.tobytes() for m in masks}) == len(SEEDS)


@pytest.mark.parametrize("load", [iris_frame, wine_frame, breast_cancer_frame], ids=["iris", "wine", "breast_cancer"])
@pytest.mark.parametrize("fraction", [0.1, 0.2, 0.5])
def test_stratified_holdout_keeps_class_proportions(load: object, fraction: float) -> None:
    frame = load()  # type: ignore[operator]
    mask = _mask(frame, "stratified", fraction, target="target")
    assert mask.sum() == holdout_count(len(frame), fraction)
    sizes = frame["target"].value_counts()
    held = frame.loc[mask, "target"].value_counts().reindex(sizes.index, fill_value=0)
    exact_share = mask.sum() * sizes / len(frame)
    # Each class gives up its exact share rounded down or up, never more than one row off.
    assert ((held - exact_share).abs() < 1).all(), pd.DataFrame({"held": held, "share": exact_share})


def test_stratified_counts_are_largest_remainder_apportionment() -> None:
    # Iris: 3 classes of 50, 30 held out -> exactly 10 each (scikit-learn's load_iris class sizes).
    assert list(stratified_counts(np.array([50, 50, 50]), 30)) == [10, 10, 10]
    # Shares 3.5, 2.1, 1.4 of 7: floors 3, 2, 1 and the last row to the largest remainder (0.5).
    assert list(stratified_counts(np.array([50, 30, 20]), 7)) == [4, 2, 1]


def test_stratified_holdout_depends_on_the_seed_within_classes() -> None:
    frame = breast_cancer_frame()
    first = _mask(frame, "stratified", seed=1, target="target")
    second = _mask(frame, "stratified", seed=2, target="target")
    assert not np.array_equal(first, second)
    assert np.array_equal(first, _mask(frame, "stratified", seed=1, target="target"))


def test_stratified_regression_holdout_matches_the_target_distribution() -> None:
    # Diabetes (Efron et al. 2004): 442 rows, 89 held out, target deciles as strata. Each decile gives up
    # its share of rows, so F_holdout and F_development can only drift apart inside one decile: the KS
    # statistic stays within 1/10 plus two rows' worth of rounding (*computed* bound). Random draws of the
    # same size pass that bound only by luck; checked with scipy.stats.ks_2samp on the same partitions.
    frame = diabetes_frame()
    y = frame["target"].to_numpy()
    bound = 1 / 10 + 2 / holdout_count(442, 0.2)
    random_worst = 0.0
    for seed in range(50):
        mask = holdout_mask(frame, "stratified", 0.2, seed, target="target", group_column=None, time_column=None,
                            task="regression")
        assert mask.sum() == holdout_count(442, 0.2)
        assert ks_2samp(y[~mask], y[mask]).statistic <= bound, seed
        chance = _mask(frame, "random", seed=seed)
        random_worst = max(random_worst, ks_2samp(y[~chance], y[chance]).statistic)
    assert random_worst > bound, "the bound should be one that random draws can break"


def test_stratified_regression_depends_on_the_seed_within_bins() -> None:
    frame = diabetes_frame()
    first, second, again = (holdout_mask(frame, "stratified", 0.2, seed, target="target", group_column=None,
                                         time_column=None, task="regression") for seed in (1, 2, 1))
    assert not np.array_equal(first, second) and np.array_equal(first, again)


def test_target_bins_are_deciles_or_fewer() -> None:
    y = pd.Series(np.arange(100.0)[::-1])
    bins = target_bins(y, 20)
    assert sorted(np.bincount(bins)) == [10] * 10  # deciles: 10 rows each
    assert np.array_equal(bins, (9 - np.arange(100) // 10))  # the lowest targets in bin 0
    assert len(np.unique(target_bins(y, 3))) == 3  # no more bins than holdout rows
    tied = pd.Series(np.repeat([5.0, 1.0, 3.0], [50, 30, 20]))
    tied_bins = target_bins(tied, 20)
    for value in (1.0, 3.0, 5.0):  # equal targets always share a bin
        assert len(np.unique(tied_bins[tied.to_numpy() == value])) == 1
    assert len(np.unique(tied_bins)) == 3


def _with_groups(n_groups: int = 40, seed: int = 3) -> pd.DataFrame:
    frame = diabetes_frame()
    rng = np.random.default_rng(seed)
    frame["depot"] = [f"depot-{g}" for g in rng.integers(0, n_groups, len(frame))]
    return frame


@pytest.mark.parametrize("seed", SEEDS)
def test_group_holdout_keeps_each_group_on_one_side(seed: int) -> None:
    frame = _with_groups()
    mask = _mask(frame, "group", seed=seed, group_column="depot")
    held, kept = set(frame.loc[mask, "depot"]), set(frame.loc[~mask, "depot"])
    assert held and kept and not held & kept
    largest = frame["depot"].value_counts().max()
    # The cut lands within one group of the wanted size.
    assert abs(int(mask.sum()) - holdout_count(len(frame), 0.2)) <= largest


def test_group_holdout_needs_two_groups() -> None:
    frame = diabetes_frame().assign(depot="Northgate")
    with pytest.raises(DatasetRejected) as caught:
        _mask(frame, "group", group_column="depot")
    assert caught.value.problems[0].pointer == "/group_column" and "single group" in caught.value.detail


def test_time_holdout_is_the_latest_rows() -> None:
    frame = diabetes_frame()
    rng = np.random.default_rng(5)
    frame["departed"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.permutation(442), unit="h")
    mask = _mask(frame, "time", time_column="departed")
    assert mask.sum() == holdout_count(442, 0.2)
    assert frame.loc[~mask, "departed"].max() < frame.loc[mask, "departed"].min()
    # No seed is involved: the latest rows are the latest rows.
    assert np.array_equal(mask, _mask(frame, "time", seed=99, time_column="departed"))


def test_time_holdout_never_splits_a_timestamp() -> None:
    frame = pd.DataFrame({"day": np.repeat(np.arange(10), 10), "x": np.arange(100.0)})
    mask = _mask(frame, "time", fraction=0.25, time_column="day")  # 25 wanted; ties force 20 or 30
    assert frame.loc[~mask, "day"].max() < frame.loc[mask, "day"].min()
    assert mask.sum() in (20, 30)


def test_time_holdout_of_a_single_time_is_rejected() -> None:
    frame = pd.DataFrame({"day": ["2024-03-01"] * 60, "x": np.arange(60.0)})
    with pytest.raises(DatasetRejected) as caught:
        _mask(frame, "time", time_column="day")
    assert "single value" in caught.value.detail


@pytest.mark.parametrize(
    ("scheme", "fraction", "columns", "pointer", "text"),
    [
        ("shuffle", 0.2, {}, "/holdout_scheme", "got 'shuffle'"),
        ("group", 0.2, {}, "/holdout_scheme", "needs a group_column"),
        ("time", 0.2, {}, "/holdout_scheme", "needs a time_column"),
        ("random", 0.0, {}, "/holdout_fraction", "got 0.0"),
        ("random", 0.51, {}, "/holdout_fraction", "at most 0.5, got 0.51"),
        ("random", float("nan"), {}, "/holdout_fraction", "got nan"),
    ],
)
def test_bad_requests_are_rejected_with_their_field(
    scheme: str, fraction: float, columns: dict[str, str], pointer: str, text: str
) -> None:
    with pytest.raises(DatasetRejected) as caught:
        _mask(diabetes_frame(), scheme, fraction, **columns)
    assert caught.value.problems[0].pointer == pointer
    assert text in caught.value.detail
