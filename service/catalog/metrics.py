"""The metric registry: names a submission may ask for, per task, and how to read them.

The computations live in the worker (scikit-learn); this module only knows names, so the API can
validate a request without importing scikit-learn.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class MetricSpec:
    """A metric's name, the range its values can take, task, direction and whether it needs probabilities.

    ``bounds`` is (lowest, highest), None where the metric is unbounded: the summary clips its
    intervals to it, since no fold score, and so no plausible mean, lies outside.
    """

    name: str
    bounds: tuple[float | None, float | None]
    task: str
    greater_is_better: bool
    needs_proba: bool
    description: str


METRICS: dict[str, MetricSpec] = {
    m.name: m
    for m in (
        MetricSpec("rmse", (0.0, None), "regression", False, False, "root mean squared error"),
        MetricSpec("mse", (0.0, None), "regression", False, False, "mean squared error"),
        MetricSpec("mae", (0.0, None), "regression", False, False, "mean absolute error"),
        MetricSpec("r2", (None, 1.0), "regression", True, False, "coefficient of determination"),
        MetricSpec("accuracy", (0.0, 1.0), "classification", True, False, "fraction of correct labels"),
        MetricSpec("balanced_accuracy", (0.0, 1.0), "classification", True, False, "mean per-class recall"),
        MetricSpec("f1", (0.0, 1.0), "classification", True, False, "F1; binary: positive class is the larger label; "
                   "multiclass: macro average"),
        MetricSpec("roc_auc", (0.0, 1.0), "classification", True, True, "area under the ROC curve; multiclass: "
                   "one-vs-rest macro average"),
        MetricSpec("log_loss", (0.0, None), "classification", False, True, "cross-entropy of predicted probabilities"),
        MetricSpec("brier", (0.0, 1.0), "classification", False, True, "Brier score (binary tasks only)"),
    )
}

DEFAULT_METRICS: dict[str, tuple[str, ...]] = {
    "regression": ("rmse", "mae", "r2"),
    "classification": ("accuracy", "balanced_accuracy", "f1"),
}


def metrics_for(task: str) -> list[MetricSpec]:
    """Return the metrics that apply to ``task``, in registry order."""
    return [m for m in METRICS.values() if m.task == task]
