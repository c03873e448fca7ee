"""Paired comparison tests against the worked values in REFERENCES.md and scipy's t distribution."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from service.gate.statistics import (
    CORRECTED_RESAMPLED_T,
    FIVE_BY_TWO_CV,
    PAIRED_T,
    corrected_resampled_t,
    corrected_t_from_moments,
    five_by_two_cv_t,
    holdout_interval,
    paired_t,
)

# REFERENCES.md, "Comparison tests": d, n_train = 180, n_test = 20.
D = [0.02, 0.01, 0.03, -0.01, 0.02, 0.0, 0.04, 0.01, 0.02, 0.01]
# REFERENCES.md, 5x2cv check: rows = repeats, columns = folds.
P_5X2 = [[0.03, 0.01], [0.02, 0.04], [0.0, 0.02], [0.05, 0.01], [0.02, 0.02]]


def test_corrected_resampled_t_reproduces_the_worked_value() -> None:
    # Nadeau & Bengio 2003, Machine Learning 52:239-281; check value *computed* (REFERENCES.md):
    # t = 2.2770, one-sided p = 0.02440.
    r = corrected_resampled_t(D, n_train=180, n_test=20)
    assert r.test == CORRECTED_RESAMPLED_T and r.decidable
    assert r.statistic is not None and r.p_greater is not None
    assert round(r.statistic, 4) == 2.2770
    assert round(r.p_greater, 5) == 0.02440
    assert r.df == 9 and r.n_differences == 10
    # The p-value is scipy's t survival function at t with df = J - 1, and the two-sided one doubles it.
    assert r.p_greater == pytest.approx(sps.t.sf(r.statistic, 9), rel=1e-12)
    assert r.p_greater == pytest.approx(1.0 - sps.t.cdf(r.statistic, 9), rel=1e-9)
    assert r.p_two_sided == pytest.approx(2.0 * sps.t.sf(abs(r.statistic), 9), rel=1e-12)


def test_uncorrected_paired_t_reproduces_the_worked_value() -> None:
    # REFERENCES.md (*computed*): the uncorrected test on the same d gives t = 3.3085, p = 0.00455.
    r = paired_t(D)
    assert r.test == PAIRED_T
    assert r.statistic is not None and r.p_greater is not None
    assert round(r.statistic, 4) == 3.3085
    assert round(r.p_greater, 5) == 0.00455
    assert r.p_greater == pytest.approx(sps.t.sf(r.statistic, 9), rel=1e-12)
    # scipy's own one-sample t-test on d is the uncorrected paired test.
    scipy_result = sps.ttest_1samp(D, 0.0, alternative="greater")
    assert r.statistic == pytest.approx(scipy_result.statistic, rel=1e-12)
    assert r.p_greater == pytest.approx(scipy_result.pvalue, rel=1e-12)


def test_the_correction_shrinks_t_by_the_published_factor() -> None:
    # Nadeau & Bengio 2003: the variance factor goes from 1/J to 1/J + n_test/n_train.
    corrected, plain = corrected_resampled_t(D, 180, 20), paired_t(D)
    assert corrected.statistic is not None and plain.statistic is not None
    assert corrected.statistic / plain.statistic == pytest.approx(math.sqrt(0.1 / (0.1 + 20 / 180)), rel=1e-12)


def test_repeated_k_fold_form_reproduces_the_worked_value() -> None:
    # Bouckaert & Frank 2004, PAKDD, LNCS 3056:3-12; check value *computed* (REFERENCES.md):
    # J = 100 (10x10), mean 0.01, s = 0.05, n_test/n_train = 1/9 -> t = 0.5747, p = 0.2834.
    r = corrected_t_from_moments(0.01, 0.05**2, 100, 1 / 9)
    assert r.statistic is not None and r.p_greater is not None
    assert round(r.statistic, 4) == 0.5747
    assert round(r.p_greater, 4) == 0.2834
    assert r.df == 99
    assert r.p_greater == pytest.approx(sps.t.sf(r.statistic, 99), rel=1e-12)


def test_repeated_form_from_differences_equals_the_moment_form() -> None:
    # 100 differences with mean exactly 0.01 and sample sd exactly 0.05: the same test as above.
    z = np.random.default_rng(7).standard_normal(100)
    d = 0.01 + 0.05 * (z - z.mean()) / z.std(ddof=1)
    r = corrected_resampled_t(d, n_train=900, n_test=100)
    assert r.statistic is not None
    assert round(r.statistic, 4) == 0.5747
    assert r.p_greater == pytest.approx(corrected_t_from_moments(0.01, 0.0025, 100, 1 / 9).p_greater, rel=1e-9)


def test_five_by_two_cv_reproduces_the_worked_value() -> None:
    # Dietterich 1998, Neural Computation 10:1895-1923; check value *computed* (REFERENCES.md):
    # t = 1.79284, two-sided p = 0.13298, df 5.
    r = five_by_two_cv_t(P_5X2)
    assert r.test == FIVE_BY_TWO_CV and r.df == 5
    assert r.statistic is not None and r.p_two_sided is not None and r.p_greater is not None
    assert round(r.statistic, 5) == 1.79284
    assert round(r.p_two_sided, 5) == 0.13298
    assert r.p_two_sided == pytest.approx(2.0 * sps.t.sf(abs(r.statistic), 5), rel=1e-12)
    # One-sided "candidate better": t.sf(t, 5), half the two-sided p since t > 0.
    assert r.p_greater == pytest.approx(r.p_two_sided / 2.0, rel=1e-12)
    assert r.estimate == 0.03  # the numerator is the first fold of the first repeat only
    assert r.mean_difference == pytest.approx(0.022)


def test_five_by_two_cv_one_sided_p_in_the_unfavourable_direction() -> None:
    r = five_by_two_cv_t(-np.asarray(P_5X2))
    assert r.statistic is not None and r.p_two_sided is not None and r.p_greater is not None
    assert r.statistic == pytest.approx(-1.79284, abs=1e-5)
    assert r.p_greater == pytest.approx(1.0 - r.p_two_sided / 2.0, rel=1e-12)


def test_sign_of_the_differences_flips_t_and_the_one_sided_p() -> None:
    up, down = corrected_resampled_t(D, 180, 20), corrected_resampled_t(-np.asarray(D), 180, 20)
    assert up.statistic is not None and down.statistic is not None
    assert down.statistic == pytest.approx(-up.statistic)
    assert down.p_greater == pytest.approx(1.0 - (up.p_greater or 0.0))


def test_lower_bound_is_the_one_sided_confidence_bound() -> None:
    r = corrected_resampled_t(D, 180, 20)
    assert r.standard_error is not None
    bound = r.lower_bound(0.05)
    assert bound == pytest.approx(0.015 - sps.t.ppf(0.95, 9) * r.standard_error)
    # The bound is above zero exactly when the one-sided p is below the level.
    assert bound is not None and (bound > 0) == ((r.p_greater or 1.0) < 0.05)


def test_a_single_difference_is_undecidable() -> None:
    r = corrected_resampled_t([0.3], 180, 20)
    assert not r.decidable
    assert r.statistic is None and r.p_greater is None and r.df is None
    assert r.undecidable == "a paired test needs at least 2 paired differences, got 1"
    assert r.estimate == 0.3


def test_equal_differences_are_undecidable_not_infinite() -> None:
    # All equal and non-zero: t would be +infinity; all zero: 0/0. Neither divides by zero here.
    r = corrected_resampled_t([0.1] * 5, 180, 20)
    assert not r.decidable and r.statistic is None and r.undecidable is not None
    assert "infinite" in r.undecidable and r.estimate == pytest.approx(0.1)
    zero = paired_t([0.0] * 5)
    assert zero.undecidable is not None and "undefined" in zero.undecidable
    spread = five_by_two_cv_t([[0.01, 0.01]] * 5)
    assert not spread.decidable and spread.undecidable is not None and "infinite" in spread.undecidable


def test_tiny_but_real_spread_is_decided() -> None:
    r = paired_t([0.1, 0.1 + 1e-9, 0.1 - 1e-9])
    assert r.decidable and r.statistic is not None and r.statistic > 1e6


@pytest.mark.parametrize("bad", [[], [0.1, float("nan")], [0.1, float("inf")]])
def test_empty_or_non_finite_differences_raise(bad: list[float]) -> None:
    with pytest.raises(ValueError):
        corrected_resampled_t(bad, 180, 20)


def test_bad_sizes_and_shapes_raise() -> None:
    with pytest.raises(ValueError, match="n_train and n_test must be positive, got 0 and 20"):
        corrected_resampled_t(D, 0, 20)
    with pytest.raises(ValueError, match=r"shape \(5, 2\), got \(4, 2\)"):
        five_by_two_cv_t(P_5X2[:4])


def test_figures_are_json_able() -> None:
    import json

    for r in (corrected_resampled_t(D, 180, 20), corrected_resampled_t([0.1] * 3, 180, 20), five_by_two_cv_t(P_5X2)):
        json.dumps(r.figures(), allow_nan=False)


def test_holdout_interval_is_the_t_prediction_interval_with_the_fold_overlap_term() -> None:
    # half width = t_{J-1, 1-rate/2} * s * sqrt(1/J + n_test/n_train + n_test/n_holdout): Nadeau & Bengio
    # 2003 (Machine Learning 52:239-281) for n_test/n_train; check value *computed* with scipy:
    # s = std(D, ddof 1) = 0.0143372, factor 0.1 + 20/180 + 20/50 = 0.61111, t_9 at 0.995 = 3.24984,
    # half width 0.0364239.
    interval = holdout_interval(D, n_train=180, n_test=20, n_holdout=50, rate=0.01)
    assert interval.folds == 10 and interval.variance_factor == pytest.approx(0.1 + 20 / 180 + 20 / 50)
    assert interval.quantile == pytest.approx(sps.t.ppf(0.995, 9), rel=1e-12)
    assert interval.quantile == pytest.approx(3.24984, abs=1e-5)
    assert interval.half_width == pytest.approx(0.0364239, abs=1e-7)
    assert interval.cv_mean == pytest.approx(0.015)
    # Without a holdout size the holdout counts as one more fold.
    assert holdout_interval(D, 180, 20, None, 0.01).variance_factor == pytest.approx(0.1 + 20 / 180 + 1)
    with pytest.raises(ValueError, match="at least 2 fold scores"):
        holdout_interval([0.5], 180, 20, 50, 0.01)


def test_holdout_interval_holds_its_rate_when_its_assumptions_hold() -> None:
    # Independent normal fold scores (n_train so large that the overlap term vanishes) and an independent
    # holdout score with variance n_test/n_holdout of a fold's: (h - m) / (s sqrt(factor)) is then exactly
    # Student's t with J - 1 df, so a sound model falls outside at the nominal rate. Simulated: 200,000
    # draws, rate 1 %; the count's binomial sd is 44, the check allows 4 sd.
    rng = np.random.default_rng(7)
    j, ratio, rate, draws = 5, 0.25, 0.01, 200_000
    interval = holdout_interval(rng.normal(size=j), n_train=1e12, n_test=1.0, n_holdout=1 / ratio, rate=rate)
    folds = rng.normal(size=(draws, j))
    holdout = rng.normal(scale=math.sqrt(ratio), size=draws)
    half = interval.quantile * folds.std(axis=1, ddof=1) * math.sqrt(interval.variance_factor)
    outside = int((np.abs(holdout - folds.mean(axis=1)) > half).sum())
    assert abs(outside - rate * draws) < 4 * math.sqrt(rate * (1 - rate) * draws)
    # A normal quantile (k standard deviations, as if s were known) fails it far more often at J = 5.
    normal = sps.norm.isf(rate / 2) * folds.std(axis=1, ddof=1) * math.sqrt(interval.variance_factor)
    assert int((np.abs(holdout - folds.mean(axis=1)) > normal).sum()) > 3 * rate * draws
