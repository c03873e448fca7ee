"""Measure how well a sealed holdout matches the development partition, column by column and overall.

A random split can by chance put unusual rows in the holdout (a narrow range of the target, one
category over-represented), which makes every later holdout score misleading. Per numeric column
(bool and datetime included) this reports the standardised mean difference and the two-sample
Kolmogorov-Smirnov statistic and the holdout rows beyond the development range (above its
maximum, below its minimum); per categorical column the total-variation distance of the level
frequencies; the target likewise; and overall the cross-validated AUC of a classifier telling
holdout rows from development rows (``service.vault.adversarial``). Declared id, group and time
columns are left out: they differ between the sides by construction or carry no distribution.

A column is out of balance when a statistic is both larger than a fixed limit (common practice)
and larger than chance alone would make it, Bonferroni-adjusted over every test in the table. The
second condition matters on small tables: at 442 rows split 353/89 the SMD of a pure-chance split
has a standard deviation of about sqrt(1/353 + 1/89) = 0.12 (*computed*), so a bare 0.1 limit
would fail nearly every draw; on big tables the fixed limits are the binding ones.

``BalanceCheck.prepare`` does the per-column work that does not depend on the draw once (sorting,
factorising), so ``measure`` can be called for each redraw of the seal cheaply, also at 1M rows.
The range statistic catches what means and distributions miss on a long-tailed column: a few
sealed rows beyond every development value (the three largest targets all sealed) move the SMD and
KS statistics very little, yet no model trained on the development rows has seen that range. Under
a random split, k holdout rows above the development maximum means the k largest values were all
sealed, with chance C(n_holdout, k) / C(n, k) (hypergeometric); a side is out of balance when that
chance is below the level. Only the target's range can put a draw out of balance, as a family of
its own at ``alpha`` (split over its two sides): it decides every holdout score, and at 442 rows
the three largest targets all sealed (chance 0.8 %, *computed*) must count, which a Bonferroni
share of the whole table would not. Features show the figures for the steward to read.

The documents carry aggregate statistics only: never rows, row ids or the sealing seed.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from service.vault.adversarial import adversarial_auc
from service.vault.tables import time_order_key

_EXACT_KS_MAX_ROWS = 10_000  # scipy's ks_2samp computes exact p-values up to this sample size ("auto")
_AUC_SEED = 0


@dataclass(frozen=True)
class BalanceLimits:
    """When a draw counts as out of balance, and how often the seal is redrawn.

    smd 0.1: the usual bound for a negligible standardised difference (common practice; e.g.
    Austin P.C. 2009, Statistics in Medicine 28:3083-3107, from memory). ks 0.1, tv 0.1 and
    adversarial_auc 0.6: common practice, no published source. alpha: family-wise level of the
    "larger than chance" condition, Bonferroni-split over the table's tests. sample_rows: rows the
    adversarial classifier sees at most (holdout rows first, up to half).
    """

    smd: float = 0.1
    ks: float = 0.1
    tv: float = 0.1
    adversarial_auc: float = 0.6
    alpha: float = 0.05
    redraws: int = 5
    sample_rows: int = 20_000
    folds: int = 5
    C: float = 1.0
    max_levels: int = 20  # categorical levels compared one by one; rarer ones are pooled as "other"

    def to_document(self) -> dict[str, Any]:
        """Return the limits as the balance document shows them to stewards."""
        return asdict(self)


DEFAULT_LIMITS = BalanceLimits()


@dataclass(frozen=True)
class Measurement:
    """One draw's balance: the per-column table, the adversarial figures and the verdict."""

    balanced: bool
    columns: list[dict[str, Any]]
    adversarial: dict[str, Any] | None
    exceeded: list[dict[str, Any]] = field(default_factory=list)

    @property
    def adversarial_auc(self) -> float | None:
        return None if self.adversarial is None else float(self.adversarial["auc"])

    def rank(self) -> tuple[int, float]:
        """Order draws: fewer exceeded limits first, then the lower adversarial AUC."""
        auc = self.adversarial_auc
        return len(self.exceeded), 0.5 if auc is None else auc


def standardised_mean_difference(development: np.ndarray, holdout: np.ndarray) -> float | None:
    """Return (mean_holdout - mean_development) / sqrt((s²_dev + s²_holdout) / 2), sample variances.

    None when a side has fewer than 2 values, or both are constant and their means differ.
    """
    if len(development) < 2 or len(holdout) < 2:
        return None
    return _smd(float(np.mean(development)), float(np.var(development, ddof=1)),
                float(np.mean(holdout)), float(np.var(holdout, ddof=1)))


def total_variation(development_counts: np.ndarray, holdout_counts: np.ndarray) -> float:
    """Return ½·Σ|p - q| between the level frequencies of the two sides."""
    p = development_counts / development_counts.sum()
    q = holdout_counts / holdout_counts.sum()
    return float(0.5 * np.abs(p - q).sum())


@dataclass
class _Numeric:
    name: str
    role: str
    values: np.ndarray  # float64, NaN where missing
    finite: int
    total: float
    mean: float
    sum_squares: float  # about the mean
    sd: float
    ordered: np.ndarray  # the finite values, sorted: for the KS statistic of any draw
    missing: int


@dataclass
class _Categorical:
    name: str
    role: str
    codes: np.ndarray  # 0..levels-1; pooled rare levels and missing values get their own codes
    counts: np.ndarray
    frequent: np.ndarray  # codes one-hot encoded for the adversarial classifier


class BalanceCheck:
    """The draw-independent part of the balance statistics of one table."""

    def __init__(self, numeric: list[_Numeric], categorical: list[_Categorical], limits: BalanceLimits,
                 order: list[str]) -> None:
        self.numeric, self.categorical, self.limits = numeric, categorical, limits
        self.order = {name: position for position, name in enumerate(order)}  # the table's column order
        # SMD, KS and missing share per numeric column (the target's range is a family of its own).
        self.tests = sum(2 + (col.missing > 0) for col in numeric) + len(categorical)

    @classmethod
    def prepare(cls, frame: pd.DataFrame, *, target: str, task: str, exclude: Iterable[str | None] = (),
                limits: BalanceLimits = DEFAULT_LIMITS) -> BalanceCheck:
        """Read the columns of ``frame`` to compare, the target among them; skip ``exclude``."""
        skipped = {str(c) for c in exclude if c}
        numeric: list[_Numeric] = []
        categorical: list[_Categorical] = []
        order: list[str] = []
        for name in frame.columns:
            if str(name) in skipped:
                continue
            order.append(str(name))
            series = frame[name]
            role = "target" if str(name) == target else "feature"
            as_classes = role == "target" and task == "classification"
            values = None if as_classes else _numeric_values(series)
            if values is None:
                categorical.append(_categorical(str(name), role, series, limits.max_levels))
            else:
                numeric.append(_numeric(str(name), role, values))
        return cls(numeric, categorical, limits, order)

    def measure(self, mask: np.ndarray) -> Measurement:
        """Compare the rows where ``mask`` is True (the holdout) with the others."""
        held = np.flatnonzero(mask)
        alpha = self.limits.alpha / max(self.tests, 1)
        columns = [self._numeric_row(col, mask, held, alpha) for col in self.numeric]
        columns += [self._categorical_row(col, held, alpha) for col in self.categorical]
        columns.sort(key=lambda row: self.order[row["name"]])
        exceeded = [{"column": row["name"], "statistic": stat, "value": row[stat]}
                    for row in columns for stat in row["exceeds"]]
        adversarial = self._adversarial(mask, held)
        if adversarial is not None and adversarial["exceeds"]:
            exceeded.append({"column": None, "statistic": "adversarial_auc", "value": adversarial["auc"]})
        return Measurement(not exceeded, columns, adversarial, exceeded)

    def _numeric_row(self, col: _Numeric, mask: np.ndarray, held: np.ndarray, alpha: float) -> dict[str, Any]:
        limits = self.limits
        values = col.values[held]
        row: dict[str, Any] = {"name": col.name, "role": col.role, "kind": "numeric"}
        exceeds = []
        if col.missing:
            missing_held = int(np.isnan(values).sum())
            values = values[~np.isnan(values)]
            counts_held = np.array([len(values), missing_held])
            counts_dev = np.array([col.finite, col.missing]) - counts_held
            share, pvalue = _frequency_difference(counts_dev, counts_held)
            row["missing_tv"], row["missing_pvalue"] = share, pvalue
            if share is not None and share > limits.tv and pvalue < alpha:
                exceeds.append("missing_tv")
        n_held = len(values)
        n_dev = col.finite - n_held
        row["rows"] = {"development": n_dev, "holdout": n_held}
        row["smd"] = row["smd_allowed"] = row["ks"] = row["ks_pvalue"] = None
        if n_held >= 2 and n_dev >= 2:
            mean_held = float(values.mean())
            ss_held = float(((values - mean_held) ** 2).sum())
            mean_dev = (col.total - float(values.sum())) / n_dev
            # The development side's sum of squares from the whole column's, without a pass over it.
            between = n_held * (mean_held - col.mean) ** 2 + n_dev * (mean_dev - col.mean) ** 2
            ss_dev = max(col.sum_squares - ss_held - between, 0.0)
            smd = _smd(mean_dev, ss_dev / (n_dev - 1), mean_held, ss_held / (n_held - 1))
            # A pure-chance split gives the SMD a standard deviation of about sqrt(1/n₁ + 1/n₂).
            allowed = max(limits.smd, float(stats.norm.isf(alpha / 2)) * math.sqrt(1 / n_dev + 1 / n_held))
            row["smd"], row["smd_allowed"] = smd, allowed
            if smd is None or abs(smd) > allowed:
                exceeds.append("smd")
        if n_held >= 1 and n_dev >= 1:
            development = None
            if max(n_dev, n_held) <= _EXACT_KS_MAX_ROWS:
                development = col.values[~mask]
                development = development[~np.isnan(development)]
            ks, pvalue = _ks(col, values, development)
            row["ks"], row["ks_pvalue"] = ks, pvalue
            if ks > limits.ks and pvalue < alpha:
                exceeds.append("ks")
            row.update(_beyond_range(col, mask, values))
            if col.role == "target" and row["beyond_range_pvalue"] < limits.alpha:  # the p covers both sides
                exceeds.append("beyond_range")
        row["exceeds"] = exceeds
        return row

    def _categorical_row(self, col: _Categorical, held: np.ndarray, alpha: float) -> dict[str, Any]:
        counts_held = np.bincount(col.codes[held], minlength=len(col.counts))
        counts_dev = col.counts - counts_held
        tv, pvalue = _frequency_difference(counts_dev, counts_held)
        exceeds = ["tv"] if tv is not None and tv > self.limits.tv and pvalue < alpha else []
        return {"name": col.name, "role": col.role, "kind": "categorical", "levels": len(col.counts),
                "rows": {"development": int(counts_dev.sum()), "holdout": int(counts_held.sum())},
                "tv": tv, "pvalue": pvalue, "exceeds": exceeds}

    def _adversarial(self, mask: np.ndarray, held: np.ndarray) -> dict[str, Any] | None:
        limits = self.limits
        rng = np.random.default_rng(_AUC_SEED)
        take_held = min(len(held), limits.sample_rows // 2)
        developed = np.flatnonzero(~mask)
        take_dev = min(len(developed), limits.sample_rows - take_held)
        rows = np.concatenate([
            rng.choice(held, take_held, replace=False) if take_held < len(held) else held,
            rng.choice(developed, take_dev, replace=False) if take_dev < len(developed) else developed,
        ])
        y = mask[rows]
        result = adversarial_auc(self._design(rows), y, limits.folds, limits.C, _AUC_SEED)
        if result is None:
            return None
        exceeds = result.auc > limits.adversarial_auc and result.pvalue < limits.alpha
        return {"auc": result.auc, "pvalue": result.pvalue, "rows": result.rows,
                "holdout_rows": result.holdout_rows, "features": result.features, "folds": result.folds,
                "exceeds": exceeds}

    def _design(self, rows: np.ndarray) -> np.ndarray:
        """Standardised numeric columns (missing: 0 plus an indicator) and one-hot frequent levels."""
        parts = []
        for col in self.numeric:
            if col.sd > 0:
                values = (col.values[rows] - col.mean) / col.sd
                missing = np.isnan(values)
                parts.append(np.where(missing, 0.0, values))
                if col.missing:
                    parts.append(missing.astype(np.float64))
        for cat in self.categorical:
            codes = cat.codes[rows]
            parts.extend((codes == code).astype(np.float64) for code in cat.frequent)
        return np.column_stack(parts) if parts else np.zeros((len(rows), 0))


def _smd(mean_dev: float, var_dev: float, mean_held: float, var_held: float) -> float | None:
    difference = mean_held - mean_dev
    pooled = math.sqrt((var_dev + var_held) / 2.0)
    if pooled == 0.0:
        return 0.0 if difference == 0.0 else None
    return float(difference / pooled)


def _ks(col: _Numeric, held: np.ndarray, development: np.ndarray | None) -> tuple[float, float]:
    """Two-sample KS statistic and p-value, equal to scipy.stats.ks_2samp(development, holdout).

    The sup of |F_dev - F_holdout| is reached at a holdout value or just below one (between two
    holdout values only F_dev moves), so the sorted whole column answers every draw with a few
    searches instead of a sort of the development side.
    """
    n_held = len(held)
    n_dev = col.finite - n_held
    held = np.sort(held)
    at = held[np.r_[True, held[1:] != held[:-1]]]  # distinct holdout values
    below_all = np.searchsorted(col.ordered, at, side="left")
    upto_all = np.searchsorted(col.ordered, at, side="right")
    below_held = np.searchsorted(held, at, side="left")
    upto_held = np.searchsorted(held, at, side="right")
    gaps = np.concatenate([
        (upto_all - upto_held) / n_dev - upto_held / n_held,
        (below_all - below_held) / n_dev - below_held / n_held,
    ])
    statistic = float(np.abs(gaps).max())
    if development is not None:
        # Small samples: scipy's exact distribution, as ks_2samp's "auto" method picks it.
        return statistic, float(stats.ks_2samp(development, held).pvalue)
    # ks_2samp's "asymp" two-sided branch: kstwo at the effective size round(n·m / (n + m)).
    effective = round(n_dev * n_held / (n_dev + n_held))
    return statistic, float(np.clip(stats.kstwo.sf(statistic, effective), 0.0, 1.0))


def _beyond_range(col: _Numeric, mask: np.ndarray, held: np.ndarray) -> dict[str, Any]:
    """Holdout rows above the development maximum and below its minimum, and the chance of the worse side.

    The chance is that of a random split sealing the k most extreme values of that side,
    C(n_holdout, k) / C(n, k), doubled for the two sides (Bonferroni) and capped at 1.
    """
    development = col.values[~mask]
    development = development[~np.isnan(development)]
    above = int((held > development.max()).sum())
    below = int((held < development.min()).sum())
    n, n_held = col.finite, len(held)

    def chance(k: int) -> float:
        return float(np.prod([(n_held - i) / (n - i) for i in range(k)])) if k else 1.0

    return {"beyond_range": {"above": above, "below": below},
            "beyond_range_pvalue": min(1.0, 2.0 * min(chance(above), chance(below)))}


def _frequency_difference(counts_dev: np.ndarray, counts_held: np.ndarray) -> tuple[float | None, float]:
    """Total-variation distance and the chi-square test of homogeneity p-value of two count vectors."""
    if counts_dev.sum() == 0 or counts_held.sum() == 0:
        return None, 1.0
    tv = total_variation(counts_dev, counts_held)
    table = np.vstack([counts_dev, counts_held])
    table = table[:, table.sum(axis=0) > 0]
    if table.shape[1] < 2:
        return tv, 1.0
    return tv, float(stats.chi2_contingency(table, correction=False).pvalue)


def _numeric_values(series: pd.Series) -> np.ndarray | None:
    """Float values (NaN where missing or infinite) of a numeric, bool or datetime column, else None."""
    dtype = series.dtype
    if pd.api.types.is_datetime64_any_dtype(dtype):
        present = series.notna().to_numpy()
        values = np.full(len(series), np.nan)
        values[present] = time_order_key(series[present], "/file").astype(np.float64)
        return values
    if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_numeric_dtype(dtype):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        unusable = ~np.isfinite(values)
        if unusable.any():
            values = np.where(unusable, np.nan, values)
        return values
    return None


def _numeric(name: str, role: str, values: np.ndarray) -> _Numeric:
    missing = np.isnan(values)
    finite = values[~missing] if missing.any() else values
    total = float(finite.sum())
    mean = total / len(finite) if len(finite) else 0.0
    sum_squares = float(((finite - mean) ** 2).sum())
    sd = math.sqrt(sum_squares / len(finite)) if len(finite) else 0.0
    return _Numeric(name, role, values, len(finite), total, mean, sum_squares, sd, np.sort(finite),
                    len(values) - len(finite))


def _categorical(name: str, role: str, series: pd.Series, max_levels: int) -> _Categorical:
    codes, _ = pd.factorize(series, use_na_sentinel=True)
    counts = np.bincount(codes[codes >= 0]) if (codes >= 0).any() else np.zeros(0, dtype=np.int64)
    order = np.argsort(-counts, kind="stable")
    kept = order[:max_levels]
    remap = np.full(len(counts) + 1, len(kept), dtype=np.int64)  # pooled "other"
    remap[kept] = np.arange(len(kept))
    remap[-1] = len(kept) + 1  # missing (code -1)
    pooled = remap[codes]
    level_counts = np.bincount(pooled, minlength=len(kept) + 2)
    present = np.flatnonzero(level_counts > 0)
    compact = np.full(len(kept) + 2, -1, dtype=np.int64)
    compact[present] = np.arange(len(present))
    final = compact[pooled]
    final_counts = level_counts[present]
    # One-hot for the classifier: levels with at least 1 % of the rows and 5 rows (common practice).
    threshold = max(5, 0.01 * len(series))
    frequent = np.flatnonzero(final_counts >= threshold)
    return _Categorical(name, role, final, final_counts, frequent)


def balance_document(draws: list[Measurement], chosen: int, *, redrawable: bool, limits: BalanceLimits,
                     excluded: Iterable[str | None] = ()) -> dict[str, Any]:
    """Return what the dataset record keeps: the chosen draw's table and every draw's summary.

    ``chosen`` indexes ``draws``. No seed and no row appears here; stewards read all of it, everyone
    else the summary keys (balanced, adversarial_auc, draws).
    """
    best = draws[chosen]
    return {
        "balanced": best.balanced,
        "adversarial_auc": best.adversarial_auc,
        "draws": len(draws),
        "chosen_draw": chosen + 1,
        "redrawable": redrawable,
        "columns": best.columns,
        "adversarial": best.adversarial,
        "excluded": [c for c in excluded if c],
        "limits": limits.to_document(),
        "attempts": [
            {"draw": i + 1, "balanced": m.balanced, "adversarial_auc": m.adversarial_auc, "exceeded": m.exceeded}
            for i, m in enumerate(draws)
        ],
    }
