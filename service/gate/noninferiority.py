"""Non-inferiority of a candidate against the champion, paired per sealed row.

Both models were scored on the same sealed rows, so each row gives a paired difference. The null
hypothesis is that the candidate is worse than the champion by at least the margin,
H0: D <= -margin, where D is the candidate's advantage in the metric's own units (positive =
candidate better, whatever the metric's direction); rejecting it shows non-inferiority.

Three forms, chosen by how the metric is built from the rows:
- a mean of per-row values (accuracy, mae, mse, log_loss, brier): the one-sample t-test of the
  oriented differences d_i against -margin, t = (mean d + margin) / (sd(d) / sqrt n), df n - 1; the
  same as scipy.stats.ttest_rel(champion + margin, candidate, alternative="greater") on losses.
- rmse, the square root of a mean of squared errors e_i: delta method. D = rmse_h - rmse_c, and
  sqrt(a) - sqrt(b) has gradient (1 / (2 sqrt a), -1 / (2 sqrt b)), so the per-row influence
  u_i = e_h,i / (2 rmse_h) - e_c,i / (2 rmse_c) has mean D to first order and SE(D) = sd(u) / sqrt n;
  t = (D + margin) / SE(D), referred to t with n - 1 df (an asymptotic test).
- anything else (roc_auc, f1, balanced_accuracy, r2): a paired bootstrap over the sealed rows
  (Efron & Tibshirani 1993): B resamples of row indices, the same indices for both models, give B
  values of D; SE(D) is their standard deviation and z = (D + margin) / SE(D) against the normal.
  The normal reference (rather than a percentile count) keeps p-values meaningful below 1 / B, where
  an online procedure's levels can lie. Seeded by the caller, so a retried job decides the same.

Every function returns a ``NonInferiority`` whose ``p_value`` is one-sided for H1: D > -margin. When
every row differs by the same amount (identical predictions) no sampling error is left and the
margin decides with certainty (p 0 or 1). These figures stay inside the service: the
verdict shows only the outcome and the level it was tested at.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import stats as sps

PAIRED_T_ROWS = "paired_t_rows"
DELTA_RMSE = "paired_delta_rmse"
PAIRED_BOOTSTRAP = "paired_bootstrap"
_ZERO_SPREAD_ULPS = 64.0


@dataclass(frozen=True)
class NonInferiority:
    """One non-inferiority test on sealed rows; ``p_value`` is None when undecidable."""

    method: str
    estimate: float  # D, the candidate's advantage in metric units (positive = better)
    margin: float
    n_rows: int
    standard_error: float | None
    statistic: float | None
    p_value: float | None  # one-sided, H1: D > -margin
    undecidable: str | None = None

    def rejects(self, level: float) -> bool:
        """Whether non-inferiority is shown at ``level`` (H0: D <= -margin rejected)."""
        return self.p_value is not None and self.p_value <= level


def mean_rows(candidate: np.ndarray, champion: np.ndarray, margin: float, greater_is_better: bool) -> NonInferiority:
    """Paired t on per-row values whose mean is the metric (a loss or a gain, oriented by the direction)."""
    c, h = _pair(candidate, champion)
    d = (c - h) if greater_is_better else (h - c)
    return _t(PAIRED_T_ROWS, d, float(d.mean()), margin, df_from=d.size)


def rmse_rows(candidate_sq: np.ndarray, champion_sq: np.ndarray, margin: float) -> NonInferiority:
    """Delta-method test for rmse from the per-row squared errors of both models."""
    c, h = _pair(candidate_sq, champion_sq)
    rc, rh = math.sqrt(float(c.mean())), math.sqrt(float(h.mean()))
    if rc == 0.0 or rh == 0.0:
        return NonInferiority(DELTA_RMSE, rh - rc, margin, c.size, None, None, None,
                              "a model has rmse 0 on the sealed rows, where the delta method's gradient is undefined")
    u = h / (2.0 * rh) - c / (2.0 * rc)
    return _t(DELTA_RMSE, u, rh - rc, margin, df_from=u.size)


def paired_bootstrap(
    metric: Callable[[np.ndarray], tuple[float, float]], n_rows: int, margin: float, greater_is_better: bool,
    rng: np.random.Generator, resamples: int = 1000,
) -> NonInferiority:
    """Paired bootstrap for a metric that is not a mean of per-row values.

    ``metric(rows)`` returns (candidate, champion) computed on the sealed rows at the given indices
    (with repeats); a resample where it is undefined (NaN, e.g. one class only) is drawn again, at
    most ``resamples`` extra times.
    """
    if n_rows < 2:
        return NonInferiority(PAIRED_BOOTSTRAP, math.nan, margin, n_rows, None, None, None,
                              f"a paired bootstrap needs at least 2 rows, got {n_rows}")
    sign = 1.0 if greater_is_better else -1.0
    c0, h0 = metric(np.arange(n_rows))
    estimate = sign * (c0 - h0)
    if not math.isfinite(estimate):
        return NonInferiority(PAIRED_BOOTSTRAP, math.nan, margin, n_rows, None, None, None,
                              "the metric is undefined on the sealed rows")
    draws: list[float] = []
    retries = 0
    while len(draws) < resamples:
        c, h = metric(rng.integers(0, n_rows, n_rows))
        value = sign * (c - h)
        if math.isfinite(value):
            draws.append(value)
        else:
            retries += 1
            if retries > resamples:
                return NonInferiority(PAIRED_BOOTSTRAP, estimate, margin, n_rows, None, None, None,
                                      "the metric is undefined on most resamples of the sealed rows")
    se = float(np.std(draws, ddof=1))
    if se <= _ZERO_SPREAD_ULPS * np.finfo(float).eps * max(1.0, abs(estimate)):
        return NonInferiority(PAIRED_BOOTSTRAP, estimate, margin, n_rows, 0.0, None,
                              0.0 if estimate + margin > 0 else 1.0, None)
    z = (estimate + margin) / se
    return NonInferiority(PAIRED_BOOTSTRAP, estimate, margin, n_rows, se, z, float(sps.norm.sf(z)))


def _pair(candidate: np.ndarray, champion: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    c, h = np.asarray(candidate, dtype=float).ravel(), np.asarray(champion, dtype=float).ravel()
    if c.shape != h.shape:
        raise ValueError(f"paired rows must match: candidate has {c.size}, champion {h.size}")
    if not (np.all(np.isfinite(c)) and np.all(np.isfinite(h))):
        raise ValueError("per-row values must all be finite")
    return c, h


def _t(method: str, values: np.ndarray, estimate: float, margin: float, *, df_from: int) -> NonInferiority:
    n = values.size
    if n < 2:
        return NonInferiority(method, estimate, margin, n, None, None, None,
                              f"a paired test needs at least 2 rows, got {n}")
    sd = float(values.std(ddof=1))
    if sd <= _ZERO_SPREAD_ULPS * np.finfo(float).eps * max(1.0, float(np.abs(values).max())):
        # Every row differs by the same amount (identical predictions give all zeros): no sampling
        # error is left, so the margin alone decides, with certainty.
        return NonInferiority(method, estimate, margin, n, 0.0, None, 0.0 if estimate + margin > 0 else 1.0,
                              None)
    se = sd / math.sqrt(n)
    t = (estimate + margin) / se
    return NonInferiority(method, estimate, margin, n, se, t, float(sps.t.sf(t, df_from - 1)))
