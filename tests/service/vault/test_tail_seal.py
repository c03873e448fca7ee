"""A long-tailed regression target: the seal splits its extremes like the rest, and balance notices when not.

Diabetes (Efron et al. 2004, bundled with scikit-learn) with its target cubed and the file sorted by it:
a long right tail, the largest values last in the file.
"""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pandas as pd
import pytest
from scipy import special

from service.vault import sealing
from service.vault.balance import DEFAULT_LIMITS, BalanceCheck
from tests.support.frames import diabetes_frame

FRACTION = 0.2


def _tailed() -> pd.DataFrame:
    frame = diabetes_frame()
    frame["target"] = frame["target"] ** 3
    return frame.sort_values("target", kind="stable").reset_index(drop=True)


def _mask(frame: pd.DataFrame, seed: int, version: int) -> np.ndarray:
    return sealing.holdout_mask(frame, "stratified", FRACTION, seed, target="target", group_column=None,
                                time_column=None, task="regression", version=version)


def test_seal_version_1_is_unchanged() -> None:
    # Pinned masks of the first seal algorithm on diabetes as scikit-learn ships it (computed with the
    # code before seal versions existed): a dataset sealed then must seal the same way if re-derived.
    frame = diabetes_frame()
    for seed, digest in ((12345, "43f1cd13a680fd30"), (7, "3ed152d7be3ee3c4")):
        held = np.flatnonzero(_mask(frame, seed, 1)).astype("<i8")
        assert hashlib.sha256(held.tobytes()).hexdigest()[:16] == digest
        default = sealing.holdout_mask(frame, "stratified", FRACTION, seed, target="target", group_column=None,
                                       time_column=None, task="regression")
        assert np.array_equal(np.flatnonzero(default), held)
    with pytest.raises(ValueError, match="seal version must be one of"):
        _mask(frame, 1, 3)


def test_the_tail_aware_seal_splits_the_extremes_like_the_rest() -> None:
    frame = _tailed()
    n = len(frame)
    n_holdout = sealing.holdout_count(n, FRACTION)
    block = math.ceil(1 / FRACTION)  # 5 rows per tail bin: each gives up one row
    top = np.arange(n - block, n)  # the file is sorted: the 5 largest targets are last
    three_largest_sealed = {1: 0, 2: 0}
    largest_sealed = {1: 0, 2: 0}
    seeds = range(1000)
    for seed in seeds:
        for version in (1, 2):
            mask = _mask(frame, seed, version)
            assert mask.sum() == n_holdout
            three_largest_sealed[version] += bool(mask[-3:].all())
            largest_sealed[version] += bool(mask[-1])
            if version == 2:
                # Every tail bin of 5 consecutive targets, at both ends, seals exactly one row.
                for start in (0, block, 2 * block, n - 3 * block, n - 2 * block, n - block):
                    assert mask[start:start + block].sum() == 1
                assert mask[top].sum() == 1
    # Version 1 drew the top decile (44 rows, 9 sealed) at random: the three largest were all sealed with
    # chance C(9, 3) / C(44, 3) = 0.63 % (*computed*); about 6 of 1,000 seeds.
    assert special.comb(9, 3) / special.comb(44, 3) == pytest.approx(0.00634, abs=1e-5)
    assert three_largest_sealed[1] >= 1 and three_largest_sealed[2] == 0
    # The largest is still sealed about one time in five, like any row: extremes are not kept out.
    assert 0.15 < largest_sealed[2] / len(seeds) < 0.25


def test_balance_counts_sealed_rows_beyond_the_development_range() -> None:
    frame = _tailed()
    check = BalanceCheck.prepare(frame, target="target", task="regression")
    # Plant the seal: the three largest targets sealed, the rest of the holdout from the body.
    n, n_holdout = len(frame), sealing.holdout_count(len(frame), FRACTION)
    mask = _mask(frame, 11, 1)
    mask[-4:] = [False, True, True, True]
    body = np.flatnonzero(mask[:-4])
    mask[body[: len(body) + 3 - n_holdout]] = False  # back to 89 sealed rows
    assert mask.sum() == n_holdout
    row = next(r for r in check.measure(mask).columns if r["name"] == "target")
    assert row["beyond_range"] == {"above": 3, "below": 0}
    # Chance that a random split seals the three largest of 442 values: C(89, 3) / C(442, 3) (hypergeometric,
    # *computed* with scipy), doubled for the two sides.
    chance = special.comb(n_holdout, 3) / special.comb(n, 3)
    assert row["beyond_range_pvalue"] == pytest.approx(2 * chance, rel=1e-9)
    assert row["beyond_range_pvalue"] < DEFAULT_LIMITS.alpha and "beyond_range" in row["exceeds"]
    # What the check looked at before: the target's SMD and KS stay inside their limits on this seal.
    assert "smd" not in row["exceeds"] and "ks" not in row["exceeds"]
    # The tail-aware seal of the same table keeps the development range around the holdout's top.
    for seed in range(20):
        fair = next(r for r in check.measure(_mask(frame, seed, 2)).columns if r["name"] == "target")
        assert fair["beyond_range"]["above"] <= 1 and "beyond_range" not in fair["exceeds"]
