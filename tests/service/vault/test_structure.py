"""Undeclared structure found at registration, on scikit-learn bundled datasets arranged to show it."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.metrics import accuracy_score, r2_score
from sklearn.model_selection import PredefinedSplit, cross_val_predict
from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor

from service.vault.structure import _nn_score, _squared_distances, undeclared_structure


def replicated_diabetes(copies: int = 3) -> pd.DataFrame:
    """Diabetes (Efron et al. 2004), each row measured ``copies`` times with tiny noise: a group per patient."""
    base = load_diabetes(as_frame=True).frame
    rng = np.random.default_rng(0)
    features = [c for c in base.columns if c != "target"]
    parts = []
    for _ in range(copies):
        part = base.copy()
        part[features] = part[features] + rng.normal(scale=2e-3, size=(len(base), len(features)))
        part["patient"] = np.arange(len(base))
        parts.append(part)
    return pd.concat(parts, ignore_index=True).sample(frac=1.0, random_state=1).reset_index(drop=True)


def test_out_of_fold_nearest_neighbour_scores_are_scikit_learns() -> None:
    # Reference: cross_val_predict(KNeighbors*(1), cv=PredefinedSplit(folds)) scored by r2_score / accuracy_score.
    X, y = load_diabetes(return_X_y=True)
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    folds = np.random.default_rng(3).permutation(len(y)) % 5
    predicted = cross_val_predict(KNeighborsRegressor(1), X, y, cv=PredefinedSplit(folds))
    assert _nn_score(_squared_distances(X), y, folds, "regression") == pytest.approx(r2_score(y, predicted), abs=1e-12)
    Xc, yc = load_breast_cancer(return_X_y=True)
    Xc = (Xc - Xc.mean(axis=0)) / Xc.std(axis=0)
    folds = np.random.default_rng(4).permutation(len(yc)) % 5
    predicted = cross_val_predict(KNeighborsClassifier(1), Xc, yc, cv=PredefinedSplit(folds))
    assert _nn_score(_squared_distances(Xc), yc, folds, "classification") == pytest.approx(
        accuracy_score(yc, predicted), abs=1e-12)


def test_a_column_of_repeated_patients_is_reported_unless_declared() -> None:
    frame = replicated_diabetes()
    found = undeclared_structure(frame, target="target", task="regression", declared={})
    groups = [w for w in found if w["kind"] == "group"]
    assert [w["column"] for w in groups] == ["patient"]
    figures = groups[0]
    # Rows of one patient on both sides: the neighbour is the same patient; whole patients per fold: no better
    # than the mean (1-NN on diabetes, measured with the reference above: about 0.94 against about 0).
    assert figures["random_folds"] > 0.8 and figures["group_folds"] < 0.2 and figures["gap"] > 0.6
    assert figures["values"] == 442 and "declare group_column 'patient'" in figures["detail"]
    declared = undeclared_structure(frame, target="target", task="regression", declared={"group_column": "patient"})
    assert [w for w in declared if w["kind"] == "group"] == []


def test_tables_without_groups_are_not_reported() -> None:
    # Diabetes and breast cancer as shipped: no column makes folds that split its values much easier.
    diabetes = load_diabetes(as_frame=True).frame
    cancer = load_breast_cancer(as_frame=True).frame
    assert undeclared_structure(diabetes, target="target", task="regression", declared={}) == []
    assert undeclared_structure(cancer, target="target", task="classification", declared={}) == []


def test_rows_in_order_are_reported() -> None:
    # Iris as shipped is sorted by class (50 rows each): consecutive rows share their class 99 % of the time
    # against 1/3 by chance. Shuffled, nothing is reported; diabetes sorted by its target has lag-1 r near 1.
    iris = load_iris(as_frame=True).frame
    found = undeclared_structure(iris, target="target", task="classification", declared={})
    assert [w["kind"] for w in found] == ["order"]
    assert found[0]["value"] == pytest.approx(147 / 149 - 1 / 3)
    shuffled = iris.sample(frac=1.0, random_state=0).reset_index(drop=True)
    assert undeclared_structure(shuffled, target="target", task="classification", declared={}) == []
    ordered = load_diabetes(as_frame=True).frame.sort_values("target")
    order = [w for w in undeclared_structure(ordered, target="target", task="regression", declared={})
             if w["kind"] == "order"]
    assert order and order[0]["value"] > 0.99
    days = iris.assign(day=pd.date_range("2026-01-01", periods=150, freq="D"))
    assert undeclared_structure(days, target="target", task="classification", declared={"time_column": "day"}) == []
