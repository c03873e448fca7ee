"""Balance of a seal: each statistic against scipy, scikit-learn or its formula, on the same partitions."""

from __future__ import annotations

import json
import math
import statistics

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.model_selection import cross_val_predict
from sklearn.preprocessing import StandardScaler

from service.vault.adversarial import (
    adversarial_auc,
    auc_chance_pvalue,
    fit_logistic,
    out_of_fold_scores,
    rank_auc,
    stratified_fold_ids,
)
from service.vault.balance import (
    DEFAULT_LIMITS,
    BalanceCheck,
    balance_document,
    standardised_mean_difference,
    total_variation,
)
from service.vault.sealing import holdout_count, holdout_mask
from tests.support.frames import breast_cancer_frame, diabetes_frame


def _mask(frame: pd.DataFrame, seed: int, task: str = "regression", scheme: str = "stratified",
          fraction: float = 0.2) -> np.ndarray:
    return holdout_mask(frame, scheme, fraction, seed, target="target", group_column=None, time_column=None,
                        task=task)


def _by_name(rows: list[dict[str, object]]) -> dict[str, dict[str, object]]:
    return {str(row["name"]): row for row in rows}


def _hand_smd(development: list[float], holdout: list[float]) -> float:
    # The formula written out with the standard library: (mean_h - mean_d) / sqrt((s_d^2 + s_h^2) / 2),
    # s^2 the sample variance (n - 1): the usual pooled-SD form of the standardised mean difference.
    pooled = math.sqrt((statistics.variance(development) + statistics.variance(holdout)) / 2)
    return (statistics.fmean(holdout) - statistics.fmean(development)) / pooled


@pytest.mark.parametrize("seed", [0, 1, 2**40 + 3])
def test_smd_and_ks_equal_the_formula_and_scipy_on_diabetes(seed: int) -> None:
    frame = diabetes_frame()
    mask = _mask(frame, seed)
    measured = _by_name(BalanceCheck.prepare(frame, target="target", task="regression").measure(mask).columns)
    assert list(measured) == list(frame.columns)  # every feature and the target, in table order
    for name in frame.columns:
        development, holdout = frame.loc[~mask, name].to_numpy(), frame.loc[mask, name].to_numpy()
        row = measured[name]
        assert row["kind"] == "numeric" and row["role"] == ("target" if name == "target" else "feature")
        assert row["smd"] == pytest.approx(_hand_smd(list(development), list(holdout)), rel=1e-9)
        assert standardised_mean_difference(development, holdout) == pytest.approx(row["smd"], rel=1e-12)
        # Reference: scipy.stats.ks_2samp (exact p-values at this size, its "auto" method).
        reference = stats.ks_2samp(development, holdout)
        assert row["ks"] == pytest.approx(reference.statistic, abs=1e-12)
        assert row["ks_pvalue"] == pytest.approx(reference.pvalue, rel=1e-9)
        assert row["rows"] == {"development": 353, "holdout": 89}


def test_ks_on_large_partitions_with_ties_and_missing_values_equals_scipy() -> None:
    # Above 10,000 rows a side ks_2samp switches to its asymptotic p-value; the statistic comes from
    # sealfold's sorted-column search. Heavy ties (integers 0..49) and 5 % missing values.
    rng = np.random.default_rng(11)
    n = 60_000
    counts = rng.integers(0, 50, n).astype(float)
    counts[rng.random(n) < 0.05] = np.nan
    frame = pd.DataFrame({"stops": counts, "target": rng.normal(size=n)})
    mask = np.zeros(n, dtype=bool)
    mask[rng.permutation(n)[:20_000]] = True
    mask &= ~(np.nan_to_num(counts, nan=-1) > 45) | (rng.random(n) < 0.3)  # a real difference in the tail
    row = _by_name(BalanceCheck.prepare(frame, target="target", task="regression").measure(mask).columns)["stops"]
    development, holdout = counts[~mask], counts[mask]
    development, holdout = development[~np.isnan(development)], holdout[~np.isnan(holdout)]
    reference = stats.ks_2samp(development, holdout)
    assert max(len(development), len(holdout)) > 10_000
    assert row["ks"] == pytest.approx(reference.statistic, abs=1e-12)
    assert row["ks_pvalue"] == pytest.approx(reference.pvalue, rel=1e-9, abs=1e-300)
    assert row["smd"] == pytest.approx(_hand_smd(list(development), list(holdout)), rel=1e-9)
    # Missing values compared as shares (the TV distance of a two-level "missing" indicator).
    share_dev, share_held = np.isnan(counts[~mask]).mean(), np.isnan(counts[mask]).mean()
    assert row["missing_tv"] == pytest.approx(abs(share_dev - share_held), abs=1e-12)


def test_total_variation_and_its_test_equal_the_formula_and_scipy() -> None:
    rng = np.random.default_rng(2)
    n = 600
    depot = rng.choice(["Harbourside", "Millbrook", "Northgate", "Quarry Lane"], n, p=[0.4, 0.3, 0.2, 0.1])
    depot = np.where(rng.random(n) < 0.05, None, depot)  # missing values are a level of their own
    frame = pd.DataFrame({"depot": depot, "target": rng.normal(size=n)})
    mask = np.zeros(n, dtype=bool)
    mask[rng.permutation(n)[:150]] = True
    row = _by_name(BalanceCheck.prepare(frame, target="target", task="regression").measure(mask).columns)["depot"]
    labels = pd.Series(depot).fillna("(missing)")
    p = labels[~mask].value_counts(normalize=True)
    q = labels[mask].value_counts(normalize=True)
    # Total-variation distance: half the L1 distance of the two frequency vectors.
    hand = 0.5 * sum(abs(p.get(level, 0.0) - q.get(level, 0.0)) for level in set(p.index) | set(q.index))
    assert row["tv"] == pytest.approx(hand, abs=1e-12) and row["levels"] == 5
    # Reference: scipy.stats.chi2_contingency on the side-by-level table (no continuity correction).
    table = pd.crosstab(mask, labels)
    assert row["pvalue"] == pytest.approx(stats.chi2_contingency(table, correction=False).pvalue, rel=1e-9)
    assert total_variation(np.array([3, 1]), np.array([1, 3])) == pytest.approx(0.5)


def test_rare_levels_are_pooled_into_one() -> None:
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"route": rng.integers(0, 300, 2_000).astype(str), "target": rng.normal(size=2_000)})
    row = _by_name(BalanceCheck.prepare(frame, target="target", task="regression").measure(
        _mask(frame, 4)).columns)["route"]
    assert row["levels"] == DEFAULT_LIMITS.max_levels + 1  # the 20 most frequent and "other"


def test_a_classification_target_is_compared_by_its_class_frequencies() -> None:
    frame = breast_cancer_frame()
    mask = _mask(frame, 5, task="classification")
    row = _by_name(BalanceCheck.prepare(frame, target="target", task="classification").measure(mask).columns)[
        "target"]
    assert row["kind"] == "categorical" and row["role"] == "target" and row["levels"] == 2
    # A stratified holdout keeps class shares to within a row: 212 malignant of 569 (load_breast_cancer).
    assert row["tv"] < 1 / holdout_count(569, 0.2)


def test_datetime_and_bool_columns_are_compared_as_numbers_and_declared_roles_are_left_out() -> None:
    frame = diabetes_frame()
    rng = np.random.default_rng(8)
    frame["departed"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 10_000, len(frame)), unit="h")
    frame.loc[frame.index[::40], "departed"] = pd.NaT
    frame["refrigerated"] = rng.random(len(frame)) < 0.3
    frame["route"] = [f"R{i:04d}" for i in range(len(frame))]
    mask = _mask(frame, 6)
    check = BalanceCheck.prepare(frame, target="target", task="regression", exclude=["route", None])
    rows = _by_name(check.measure(mask).columns)
    assert "route" not in rows
    ticks = frame["departed"].astype("int64").where(frame["departed"].notna())
    development, holdout = ticks[~mask].dropna().to_numpy(), ticks[mask].dropna().to_numpy()
    assert rows["departed"]["kind"] == "numeric"
    assert rows["departed"]["ks"] == pytest.approx(stats.ks_2samp(development, holdout).statistic, abs=1e-12)
    flags = frame["refrigerated"].astype(float)
    assert rows["refrigerated"]["smd"] == pytest.approx(_hand_smd(list(flags[~mask]), list(flags[mask])), rel=1e-9)


def test_the_smd_limit_allows_what_chance_alone_produces() -> None:
    # Under a random split the difference of means has variance S^2 (1/n1 + 1/n2) (the permutation
    # variance of a difference of means), so |SMD| has a standard deviation near sqrt(1/n1 + 1/n2): 0.12
    # for 353/89 rows (*computed*). The allowance is the Bonferroni-adjusted normal quantile of it.
    frame = diabetes_frame()
    check = BalanceCheck.prepare(frame, target="target", task="regression")
    row = _by_name(check.measure(_mask(frame, 7)).columns)["age"]
    tests = 2 * 11  # SMD and KS of 10 features and the target
    z = stats.norm.ppf(1 - DEFAULT_LIMITS.alpha / tests / 2)
    assert row["smd_allowed"] == pytest.approx(max(0.1, z * math.sqrt(1 / 353 + 1 / 89)), rel=1e-12)
    assert row["smd_allowed"] > 0.3  # at this size the fixed 0.1 (common practice) would fail most draws


def test_a_holdout_of_the_top_target_decile_is_out_of_balance() -> None:
    frame = diabetes_frame()
    top = (frame["target"].rank(method="first", ascending=False) <= holdout_count(442, 0.1)).to_numpy()
    measured = BalanceCheck.prepare(frame, target="target", task="regression").measure(top)
    assert not measured.balanced
    flagged = {(e["column"], e["statistic"]) for e in measured.exceeded}
    assert {("target", "smd"), ("target", "ks"), (None, "adversarial_auc")} <= flagged
    assert measured.adversarial_auc is not None and measured.adversarial_auc > 0.9


@pytest.mark.parametrize(("load", "task"), [(diabetes_frame, "regression"), (breast_cancer_frame, "classification")],
                         ids=["diabetes", "breast_cancer"])
def test_chance_draws_are_rarely_out_of_balance(load: object, task: str) -> None:
    # Each check of a draw holds a family-wise level of 5 % (Bonferroni) and the AUC another 5 %, so
    # at most about 10 % of chance draws should be flagged; allow 20 % of 40 fixed seeds.
    frame = load()  # type: ignore[operator]
    check = BalanceCheck.prepare(frame, target="target", task=task)
    draws = [check.measure(_mask(frame, seed, task=task, scheme="random")) for seed in range(40)]
    assert sum(not d.balanced for d in draws) <= 8
    aucs = [d.adversarial_auc for d in draws if d.adversarial_auc is not None]
    assert len(aucs) == 40 and abs(float(np.mean(aucs)) - 0.5) < 0.05


def test_the_document_is_plain_json_without_seeds_or_rows() -> None:
    frame = diabetes_frame()
    check = BalanceCheck.prepare(frame, target="target", task="regression")
    seeds = [2**62 + 12345, 2**61 + 999]
    draws = [check.measure(_mask(frame, s)) for s in seeds]
    document = balance_document(draws, 1, redrawable=True, limits=DEFAULT_LIMITS, excluded=["patient", None])
    text = json.dumps(document, allow_nan=False)  # strict JSON: no NaN or infinity
    assert all(str(s) not in text for s in seeds)
    assert document["draws"] == 2 and document["chosen_draw"] == 2 and document["excluded"] == ["patient"]
    assert [a["draw"] for a in document["attempts"]] == [1, 2]
    # Aggregates only: no list in the document is as long as a partition (no per-row values or ids).
    lengths = list(_list_lengths(document))
    assert lengths and max(lengths) <= len(frame.columns)


def _list_lengths(node: object) -> list[int]:
    if isinstance(node, dict):
        return [n for value in node.values() for n in _list_lengths(value)]
    if isinstance(node, list):
        return [len(node), *(n for item in node for n in _list_lengths(item))]
    return []


# -- the logistic regression and the AUC, against scikit-learn ------------------------------------

def _cancer_design() -> tuple[np.ndarray, np.ndarray]:
    frame = breast_cancer_frame()
    X = StandardScaler().fit_transform(frame.drop(columns="target").to_numpy())
    return X, frame["target"].to_numpy()


@pytest.mark.parametrize("C", [0.01, 1.0, 10.0])
def test_logistic_fit_equals_sklearns_logistic_regression(C: float) -> None:
    X, y = _cancer_design()
    fit = fit_logistic(X, y, C)
    # Reference: LogisticRegression(C) minimises the same 1/2 |w|^2 + C * sum of log-losses, intercept
    # unpenalised; solved here to a tight tolerance.
    reference = LogisticRegression(C=C, solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(X, y)
    assert fit.converged
    np.testing.assert_allclose(fit.coef, reference.coef_[0], rtol=1e-5, atol=1e-6)
    assert fit.intercept == pytest.approx(reference.intercept_[0], rel=1e-5, abs=1e-6)
    np.testing.assert_allclose(fit.decision(X), reference.decision_function(X), rtol=1e-5, atol=1e-5)


def test_rank_auc_equals_roc_auc_score_also_with_ties() -> None:
    rng = np.random.default_rng(1)
    y = rng.random(500) < 0.3
    scores = np.round(rng.normal(size=500) + y, 1)  # rounded: many tied scores
    assert rank_auc(y, scores) == pytest.approx(roc_auc_score(y, scores), abs=1e-12)


def test_auc_chance_pvalue_equals_scipys_mann_whitney_normal_approximation() -> None:
    rng = np.random.default_rng(4)
    y = rng.random(300) < 0.25
    scores = rng.normal(size=300) + 0.3 * y  # continuous: no ties, so no tie correction
    reference = stats.mannwhitneyu(scores[y], scores[~y], alternative="greater", method="asymptotic",
                                   use_continuity=False)
    assert auc_chance_pvalue(rank_auc(y, scores), int(y.sum()), int((~y).sum())) == pytest.approx(
        reference.pvalue, rel=1e-9)


def test_out_of_fold_scores_equal_sklearns_cross_val_predict() -> None:
    X, y = _cancer_design()
    fold_ids = stratified_fold_ids(y, 5, np.random.default_rng(0))
    folds = [(np.flatnonzero(fold_ids != k), np.flatnonzero(fold_ids == k)) for k in range(5)]
    ours = out_of_fold_scores(X, y, fold_ids, C=1.0)
    reference = cross_val_predict(LogisticRegression(C=1.0, solver="newton-cholesky", tol=1e-12, max_iter=1000),
                                  X, y, cv=folds, method="decision_function")
    np.testing.assert_allclose(ours, reference, rtol=1e-5, atol=1e-5)
    # And the AUC of those scores is scikit-learn's roc_auc_score of them.
    result = adversarial_auc(X, y.astype(bool), folds=5, seed=0)
    assert result is not None
    assert result.auc == pytest.approx(roc_auc_score(y, reference), abs=1e-6)


def test_stratified_fold_ids_spread_each_side_evenly() -> None:
    y = np.r_[np.zeros(353, dtype=bool), np.ones(89, dtype=bool)]
    fold_ids = stratified_fold_ids(y, 5, np.random.default_rng(9))
    for label in (False, True):
        sizes = np.bincount(fold_ids[y == label], minlength=5)
        assert sizes.max() - sizes.min() <= 1


def test_adversarial_auc_needs_two_rows_a_side() -> None:
    X = np.random.default_rng(0).normal(size=(40, 3))
    assert adversarial_auc(X, np.r_[np.ones(1, dtype=bool), np.zeros(39, dtype=bool)]) is None
