"""Report sections for the train/validation gap, the learning curve and a nested search: content and escaping."""

from __future__ import annotations

import re
from types import SimpleNamespace
from typing import Any, cast

import pytest

from service.report.facts import ReportFacts
from service.report.fitting import curve_chart, diagnosis_section


def facts(summary: dict[str, Any]) -> ReportFacts:
    return cast(ReportFacts, SimpleNamespace(summary=summary, metrics=["rmse"], primary_metric="rmse"))


SUMMARY = {
    "fit_gap": {"metrics": {"rmse": {"train_mean": 40.0, "validation_mean": 55.0, "gap": 15.0,
                                     "reading": "large gap <script>alert(1)</script>"}}, "note": "evidence & more"},
    "learning_curve": [
        {"fraction": 0.1, "train_rows": 32.0, "folds": 5, "train_mean": {"rmse": 30.0},
         "validation_mean": {"rmse": 70.0}},
        {"fraction": 1.0, "train_rows": 320.0, "folds": 5, "train_mean": {"rmse": 40.0},
         "validation_mean": {"rmse": 55.0}},
    ],
    "search": {"scoring": "rmse", "outer_folds": 5, "chosen": {"alpha": [{"value": "<1.0>", "folds": 5}]},
               "nested_mean": 55.0, "naive_best_inner_mean": 53.0, "note": "optimistic"},
}


def test_sections_show_gap_curve_and_search_escaped() -> None:
    html = str(diagnosis_section(facts(SUMMARY)))
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert "&lt;1.0&gt;" in html and "evidence &amp; more" in html
    assert "Learning curve" in html and "Nested search" in html
    assert "nested estimate 55, naive best inner score 53" in html
    # One train and one validation marker per size, each with a hover title naming its value.
    assert html.count("<title>train, 32 training rows: rmse 30</title>") == 1
    assert html.count("<title>validation, 320 training rows: rmse 55</title>") == 1


def test_curve_points_are_placed_in_order_on_the_x_axis() -> None:
    svg = str(curve_chart([(32.0, 30.0, 70.0), (160.0, 35.0, 60.0), (320.0, 40.0, 55.0)], "rmse"))
    lines = re.findall(r'<polyline points="([^"]+)"', svg)
    assert len(lines) == 2
    for line in lines:
        xs = [float(p.split(",")[0]) for p in line.split()]
        assert xs == sorted(xs) and len(xs) == 3
        # Linear in training rows: 160 sits at (160 - 32) / (320 - 32) of the way between the ends.
        assert (xs[1] - xs[0]) / (xs[2] - xs[0]) == pytest.approx(128 / 288, abs=1e-3)


def test_nothing_recorded_says_so() -> None:
    assert "No training-fold scores" in str(diagnosis_section(facts({})))
