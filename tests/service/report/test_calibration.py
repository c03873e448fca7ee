"""The report's calibration section: the pooled reliability curve, unjoined fold points, the bins said."""

from __future__ import annotations

import re
from types import SimpleNamespace
from typing import Any, cast

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.report.calibration import calibration_section
from service.report.facts import ReportFacts
from worker.learning.calibration import fold_bins, pooled


def facts(summary: dict[str, Any], task: str = "classification") -> ReportFacts:
    return cast(ReportFacts, SimpleNamespace(summary=summary, dataset={"task": task}))


def _calibration(positive: str) -> dict[str, Any]:
    # Out-of-fold probabilities of a logistic regression on breast cancer (bundled with scikit-learn),
    # three stratified folds; labels renamed so the positive class's name must be escaped.
    X, y = load_breast_cancer(return_X_y=True)
    labels = np.where(y == 1, positive, "a")
    classes = np.array(sorted({positive, "a"}))
    rows = []
    for k, (train, test) in enumerate(StratifiedKFold(3, shuffle=True, random_state=0).split(X, y)):
        model = make_pipeline(StandardScaler(), LogisticRegression(C=0.01)).fit(X[train], labels[train])
        rows.append({"repeat": 0, "fold": k,
                     "calibration": fold_bins(labels[test], model.predict_proba(X[test]), classes)})
    result = pooled(rows)
    assert result is not None
    return result


def test_the_pooled_curve_is_one_line_and_fold_points_are_not_joined() -> None:
    calibration = _calibration("z<b>")  # sorts after "a": the positive class
    html = str(calibration_section(facts({"calibration": calibration})))
    assert "z<b>" not in html and "class z&lt;b&gt;" in html
    assert "10 equal-width bins of [0, 1]" in html
    assert f"Expected calibration error (ECE) <strong>{calibration['ece']:.4g}</strong>" in html
    # One polyline: the pooled curve; every fold point is a marker of its own.
    assert len(re.findall(r"<polyline", html)) == 1
    fold_points = sum(len(f["points"]) for f in calibration["folds"])
    assert html.count("<title>repeat 0, fold ") == fold_points
    pooled_points = sum(1 for b in calibration["curve"] if b["count"])
    assert html.count("<title>pooled: mean predicted") == pooled_points
    assert html.count("<tr>") == 11  # header and the ten bins


def test_no_probabilities_says_so_and_regression_has_no_section() -> None:
    assert "No reliability curve" in str(calibration_section(facts({})))
    assert calibration_section(facts({}, "regression")) is None


def test_a_fold_with_non_finite_probabilities_is_left_out() -> None:
    # A NaN probability has no bin; the fold stores no bins and the pooled curve is built without it.
    classes = np.array([0, 1])
    assert fold_bins(np.array([0, 1]), np.array([[0.5, 0.5], [np.nan, np.nan]]), classes) is None
    kept = fold_bins(np.array([0, 1]), np.array([[0.8, 0.2], [0.3, 0.7]]), classes)
    result = pooled([{"repeat": 0, "fold": 0, "calibration": None}, {"repeat": 0, "fold": 1, "calibration": kept}])
    assert result is not None and result["rows"] == 2 and [f["fold"] for f in result["folds"]] == [1]
    # Two rows, bins 0.2 (observed 0) and 0.7 (observed 1): ECE = (0.2 + 0.3) / 2 (computed by hand).
    assert result["ece"] == pytest.approx(0.25)
