"""Compare two models' paired fold scores: corrected resampled t, plain paired t, 5x2cv paired t.

Two models scored on the same folds give paired differences, but the folds share training rows, so
the differences are correlated and the plain paired t-test overstates the evidence. Nadeau & Bengio
(2003) correct the variance by adding n_test/n_train to 1/J; Bouckaert & Frank (2004) apply the same
statistic to repeated k-fold with J = k * r and df = J - 1. Dietterich's (1998) 5x2cv paired t-test
is the option for small data.

Differences are oriented by the caller so that positive means "candidate better". Every function
returns a ``PairedTest``. Degenerate input never divides by zero: with fewer than two differences
the variance does not exist, and with zero spread (all differences equal) the statistic would be
+/- infinity (or 0/0 when they are all zero); both come back ``undecidable`` with the reason, the
estimate still filled in, and the statistic and p-values ``None``. What a verdict makes of that is
the caller's decision.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats as sps

CORRECTED_RESAMPLED_T = "corrected_resampled_t"
PAIRED_T = "paired_t"
FIVE_BY_TWO_CV = "five_by_two_cv"

# Spread below this many ulps of the largest difference counts as zero: differences that are equal
# in exact arithmetic can differ in the last bits, which would give an absurd but finite t.
_ZERO_SPREAD_ULPS = 64.0


@dataclass(frozen=True)
class PairedTest:
    """The outcome of one paired test; ``statistic`` and p-values are None when undecidable."""

    test: str
    estimate: float  # the numerator: the mean difference, or p_1^(1) for 5x2cv
    mean_difference: float  # mean of all differences (equals ``estimate`` except for 5x2cv)
    n_differences: int
    standard_error: float | None
    statistic: float | None
    df: int | None
    p_greater: float | None  # one-sided, H1: true mean difference > 0 (candidate better)
    p_two_sided: float | None
    undecidable: str | None = None

    @property
    def decidable(self) -> bool:
        """Whether the statistic and p-values exist."""
        return self.undecidable is None

    def lower_bound(self, alpha: float) -> float | None:
        """Return the one-sided (1 - alpha) lower confidence bound of the mean difference."""
        if self.standard_error is None or self.df is None:
            return None
        return float(self.estimate - sps.t.ppf(1.0 - alpha, self.df) * self.standard_error)

    def figures(self) -> dict[str, Any]:
        """Return the JSON-able figures a verdict shows for this test."""
        return {
            "test": self.test, "estimate": self.estimate, "mean_difference": self.mean_difference,
            "n_differences": self.n_differences, "standard_error": self.standard_error,
            "t": self.statistic, "df": self.df, "p_one_sided": self.p_greater,
            "p_two_sided": self.p_two_sided, "undecidable": self.undecidable,
        }


def corrected_resampled_t(differences: Sequence[float] | np.ndarray, n_train: float, n_test: float) -> PairedTest:
    """Run the corrected resampled t-test on J paired differences from (repeated) k-fold.

    ``n_train`` and ``n_test`` are the training and test sizes of a fold; with unequal folds pass
    their means (the correction only needs the ratio).
    """
    if not (n_train > 0 and n_test > 0):
        raise ValueError(f"n_train and n_test must be positive, got {n_train} and {n_test}")
    d = _as_differences(differences)
    return _from_moments(CORRECTED_RESAMPLED_T, float(d.mean()), _sample_variance(d), d.size, n_test / n_train)


def corrected_t_from_moments(mean: float, variance: float, n: int, test_train_ratio: float) -> PairedTest:
    """Run the corrected resampled t-test from the mean and sample variance (ddof 1) of n differences."""
    if not test_train_ratio > 0:
        raise ValueError(f"test_train_ratio must be positive, got {test_train_ratio}")
    return _from_moments(CORRECTED_RESAMPLED_T, mean, variance if n >= 2 else math.nan, n, test_train_ratio)


def paired_t(differences: Sequence[float] | np.ndarray) -> PairedTest:
    """Run the plain paired t-test (no correction); shown beside the corrected one for comparison."""
    d = _as_differences(differences)
    return _from_moments(PAIRED_T, float(d.mean()), _sample_variance(d), d.size, 0.0)


def five_by_two_cv_t(differences: Sequence[Sequence[float]] | np.ndarray) -> PairedTest:
    """Run Dietterich's 5x2cv paired t-test on a 5 x 2 array: row = repeat, column = fold.

    t = p_1^(1) / sqrt(mean over repeats of s_i^2), s_i^2 = sum over the two folds of
    (p_i^(j) - p̄_i)^2, df = 5. The numerator is the first fold's difference only, as published.
    """
    p = np.asarray(differences, dtype=float)
    if p.shape != (5, 2):
        raise ValueError(f"5x2cv needs differences of shape (5, 2), got {p.shape}")
    if not np.all(np.isfinite(p)):
        raise ValueError("5x2cv differences must all be finite")
    s2 = ((p - p.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    estimate, mean_all = float(p[0, 0]), float(p.mean())
    if _zero_spread(p - p.mean(axis=1, keepdims=True), p):
        return PairedTest(FIVE_BY_TWO_CV, estimate, mean_all, 10, None, None, None, None, None,
                          _zero_spread_reason(p))
    se = math.sqrt(float(s2.mean()))
    t = estimate / se
    return PairedTest(FIVE_BY_TWO_CV, estimate, mean_all, 10, se, t, 5,
                      float(sps.t.sf(t, 5)), float(2.0 * sps.t.sf(abs(t), 5)))


def _from_moments(test: str, mean: float, variance: float, n: int, ratio: float) -> PairedTest:
    """Build the t-test result from moments; ratio = n_test/n_train (0 for the plain test)."""
    if n < 2:
        return PairedTest(test, mean, mean, n, None, None, None, None, None,
                          f"a paired test needs at least 2 paired differences, got {n}")
    if not (math.isfinite(mean) and math.isfinite(variance) and variance >= 0):
        raise ValueError(f"mean and variance must be finite and variance >= 0, got {mean} and {variance}")
    if math.sqrt(variance) <= _ZERO_SPREAD_ULPS * np.finfo(float).eps * abs(mean):
        return PairedTest(test, mean, mean, n, None, None, None, None, None,
                          f"all {n} paired differences equal {mean:.6g}: their variance is zero, so t would be "
                          + ("undefined (0/0)" if mean == 0 else "infinite") + " and the test cannot weigh them")
    se = math.sqrt((1.0 / n + ratio) * variance)
    t = mean / se
    df = n - 1
    return PairedTest(test, mean, mean, n, se, t, df, float(sps.t.sf(t, df)), float(2.0 * sps.t.sf(abs(t), df)))


def _as_differences(differences: Sequence[float] | np.ndarray) -> np.ndarray:
    d = np.asarray(differences, dtype=float).ravel()
    if d.size == 0:
        raise ValueError("a paired test needs paired differences, got none")
    if not np.all(np.isfinite(d)):
        raise ValueError("paired differences must all be finite (leave failed folds out)")
    return d


def _sample_variance(d: np.ndarray) -> float:
    """Return the ddof-1 variance, NaN for a single difference (where it does not exist)."""
    return float(d.var(ddof=1)) if d.size >= 2 else math.nan


def _zero_spread(deviations: np.ndarray, values: np.ndarray) -> bool:
    scale = float(np.abs(values).max())
    return bool(float(np.abs(deviations).max()) <= _ZERO_SPREAD_ULPS * float(np.finfo(float).eps) * scale)


def _zero_spread_reason(p: np.ndarray) -> str:
    return ("the two folds of every repeat give equal differences: every s_i^2 is zero, so t would be "
            + ("undefined (0/0)" if p[0, 0] == 0 else "infinite") + " and the test cannot weigh them")


@dataclass(frozen=True)
class HoldoutInterval:
    """Where a sound model's holdout score is expected: cv_mean +/- half_width (before any floor).

    The prediction interval for one new score (the holdout's) from J correlated fold scores. With s
    the fold std (ddof 1), J folds of n_test rows trained on n_train rows and n_holdout sealed rows:

        half_width = t_{J-1, 1 - rate/2} * s * sqrt(1/J + n_test/n_train + n_test/n_holdout)

    - 1/J + n_test/n_train: the variance of the CV mean in units of one fold's, the correlated folds'
      correction of Nadeau & Bengio (2003, "Inference for the Generalization Error", Machine Learning
      52:239-281; repeated k-fold with J = k * r, Bouckaert & Frank 2004); 1/J alone treats the folds
      as independent and understates it.
    - n_test/n_holdout: the holdout score is one more score like a fold's, on n_holdout rows instead
      of n_test, so its variance is a fold's scaled by the row counts.
    - t with J - 1 degrees of freedom: s itself comes from J scores; a normal quantile (a fixed k
      standard deviations) ignores that and fails sound models several times as often as it says.
    ``rate`` is the nominal false-fail rate: the chance a sound model's holdout lands outside.
    """

    cv_mean: float
    fold_std: float
    folds: int
    variance_factor: float  # 1/J + n_test/n_train + n_test/n_holdout
    quantile: float  # t_{J-1, 1 - rate/2}
    half_width: float
    rate: float

    @property
    def expected_spread(self) -> float:
        """The standard error of (holdout - CV mean): fold std times sqrt(variance_factor)."""
        return self.fold_std * math.sqrt(self.variance_factor)


def holdout_interval(
    fold_scores: Sequence[float] | np.ndarray, n_train: float, n_test: float, n_holdout: float | None, rate: float,
) -> HoldoutInterval:
    """Return the prediction interval of a holdout score from fold scores (see ``HoldoutInterval``).

    Without ``n_holdout`` the holdout counts as one more fold (n_test/n_holdout = 1).
    """
    scores = np.asarray(fold_scores, dtype=float).ravel()
    if scores.size < 2:
        raise ValueError(f"a holdout interval needs at least 2 fold scores, got {scores.size}")
    if not (n_train > 0 and n_test > 0) or (n_holdout is not None and not n_holdout > 0):
        raise ValueError(f"row counts must be positive, got n_train {n_train}, n_test {n_test}, "
                         f"n_holdout {n_holdout}")
    if not 0.0 < rate < 1.0:
        raise ValueError(f"rate must be in (0, 1), got {rate}")
    j = scores.size
    factor = 1.0 / j + n_test / n_train + (1.0 if n_holdout is None else n_test / n_holdout)
    quantile = float(sps.t.isf(rate / 2.0, j - 1))
    std = float(scores.std(ddof=1))
    return HoldoutInterval(float(scores.mean()), std, j, factor, quantile, quantile * std * math.sqrt(factor), rate)


def without_largest(per_example: np.ndarray, form: str, count: int) -> float:
    """Return the metric recomputed without the ``count`` largest per-example losses.

    ``form`` says how the per-example values make the metric: "mean" or "sqrt_of_mean" (rmse).
    """
    values = np.sort(np.asarray(per_example, dtype=float))
    if not 0 <= count < values.size:
        raise ValueError(f"count must be in [0, {values.size}), got {count}")
    kept = values[: values.size - count]
    mean = float(kept.mean())
    if form == "sqrt_of_mean":
        return math.sqrt(mean)
    if form != "mean":
        raise ValueError(f"form must be 'mean' or 'sqrt_of_mean', got {form!r}")
    return mean
