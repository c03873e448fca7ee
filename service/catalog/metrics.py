"""The metric registry: names a submission may ask for, per task, their options, and how to read them.

The computations live in the worker (scikit-learn); this module only knows names, so the API can
validate a request without importing scikit-learn. A metric with options is named by a key that
spells every choice out, ``f1(average=weighted)``, ``pinball_loss(alpha=0.9)``; the key is what the
configuration stores (and so fingerprints), what fold scores, summaries and policies are keyed by, and
what a client may send back. ``service.catalog.metric_keys`` parses and resolves keys.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class MetricOption:
    """One choice a metric takes: an averaging, a positive label, a quantile, a power."""

    name: str
    description: str
    choices: tuple[str, ...] = ()  # the accepted words, for a choice among words
    required: bool = False  # no default: the submission must declare it


@dataclass(frozen=True)
class MetricSpec:
    """A metric's name, the range its values can take, task, direction and whether it needs probabilities.

    ``bounds`` is (lowest, highest), None where the metric is unbounded: the summary clips its
    intervals to it, since no fold score, and so no plausible mean, lies outside.
    ``in_target_units``: its values are in the target's units (or their square), so no default
    margin can fit every dataset. ``options``: what a key may set (see ``METRIC_OPTIONS``).
    """

    name: str
    bounds: tuple[float | None, float | None]
    task: str
    greater_is_better: bool
    needs_proba: bool
    description: str
    options: tuple[str, ...] = ()
    in_target_units: bool = False


_AVERAGES = ("binary", "micro", "macro", "weighted")
METRIC_OPTIONS: dict[str, MetricOption] = {
    "average": MetricOption(
        "average", "how per-class values combine, as scikit-learn's average=: binary (the positive class only; "
        "two-class datasets), micro (pooled counts), macro (unweighted mean over the dataset's classes), "
        "weighted (mean weighted by each class's rows). Default: binary on two classes, else macro",
        _AVERAGES),
    "pos_label": MetricOption(
        "pos_label", "the positive class, one of the dataset's classes (two-class datasets; with average=binary). "
        "Default: the larger label in sorted order, scikit-learn's classes_[1]"),
    "alpha": MetricOption("alpha", "the quantile, in (0, 1); no default", required=True),
    "power": MetricOption(
        "power", "Tweedie power: <= 0, or >= 1 (0 normal, 1 Poisson, 2 gamma, 3 inverse Gaussian); no default",
        required=True),
}

_LABELS = ("average", "pos_label")
METRICS: dict[str, MetricSpec] = {
    m.name: m
    for m in (
        MetricSpec("rmse", (0.0, None), "regression", False, False, "root mean squared error",
                   in_target_units=True),
        MetricSpec("mse", (0.0, None), "regression", False, False, "mean squared error", in_target_units=True),
        MetricSpec("mae", (0.0, None), "regression", False, False, "mean absolute error", in_target_units=True),
        MetricSpec("r2", (None, 1.0), "regression", True, False, "coefficient of determination"),
        MetricSpec("explained_variance", (None, 1.0), "regression", True, False,
                   "explained variance: 1 - Var(y - y_pred) / Var(y)"),
        MetricSpec("median_absolute_error", (0.0, None), "regression", False, False,
                   "median of the absolute errors", in_target_units=True),
        MetricSpec("mape", (0.0, None), "regression", False, False,
                   "mean absolute percentage error, a fraction (0.1 = 10 %); a target value of 0 makes it huge, "
                   "as scikit-learn divides by max(|y|, machine epsilon)"),
        MetricSpec("pinball_loss", (0.0, None), "regression", False, False,
                   "mean pinball (quantile) loss at quantile alpha", ("alpha",), in_target_units=True),
        MetricSpec("poisson_deviance", (0.0, None), "regression", False, False,
                   "mean Poisson deviance: needs a target >= 0 and predictions > 0", in_target_units=True),
        MetricSpec("gamma_deviance", (0.0, None), "regression", False, False,
                   "mean gamma deviance: needs a target > 0 and predictions > 0"),
        MetricSpec("tweedie_deviance", (0.0, None), "regression", False, False,
                   "mean Tweedie deviance at a power: power < 0 needs predictions > 0; 1 <= power < 2 a target "
                   ">= 0; power >= 2 a target > 0 (and predictions > 0 for any power but 0)", ("power",),
                   in_target_units=True),
        MetricSpec("accuracy", (0.0, 1.0), "classification", True, False, "fraction of correct labels"),
        MetricSpec("balanced_accuracy", (0.0, 1.0), "classification", True, False,
                   "mean per-class recall over the classes present in the scored rows"),
        MetricSpec("precision", (0.0, 1.0), "classification", True, False, "precision, averaged as declared",
                   _LABELS),
        MetricSpec("recall", (0.0, 1.0), "classification", True, False, "recall, averaged as declared", _LABELS),
        MetricSpec("f1", (0.0, 1.0), "classification", True, False, "F1, averaged as declared", _LABELS),
        MetricSpec("matthews_corrcoef", (-1.0, 1.0), "classification", True, False,
                   "Matthews correlation coefficient (multiclass: Gorodkin's R_K)"),
        MetricSpec("average_precision", (0.0, 1.0), "classification", True, True,
                   "area under the precision-recall curve (step-wise, scikit-learn's average_precision_score); "
                   "two classes: of the positive class; more: one-vs-rest, averaged as declared (micro, macro "
                   "or weighted)", _LABELS),
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


def metric_name(key: str) -> str:
    """Return the metric name of a key: ``f1`` for ``f1(average=macro)``."""
    return key.split("(", 1)[0].strip()


def spec_of(key: str) -> MetricSpec:
    """Return the spec of the metric a key names (its options do not change range or direction)."""
    return METRICS[metric_name(key)]
