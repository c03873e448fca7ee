"""Fan-in: turn a submission's fold records into its cross-validation summary.

Per metric: mean, sample standard deviation (ddof=1), min, max and a naive 95 % t-interval over
the J fold scores, mean +/- t(0.975, J-1) * s / sqrt(J), its ends clipped to the metric's range
(``MetricSpec.bounds``: accuracy cannot exceed 1 nor log loss fall below 0) and ``clipped`` true
when either end was moved. A score undefined on a fold (None, its
reason in the fold's ``undefined``) is left out: J (``n``) counts the folds used, ``undefined`` the
succeeded folds left out. It is labelled naive because it treats
folds as independent samples, and cross-validation folds are not: Bates, Hastie and Tibshirani
(2024, JASA 119:1434-1445) show such intervals undercover. The baseline is summarised over the
same folds as the candidate, so the two stay paired.
"""

from __future__ import annotations

import math
import platform
from collections.abc import Mapping, Sequence
from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd
import scipy
import sklearn
from redis import Redis
from scipy import stats

import service
from service.catalog import load_catalog
from service.catalog.metrics import spec_of
from service.records import submissions
from service.submission.dispatch import fold_cells
from service.submission.resolved import ResolvedConfig, ValidationPlan
from service.vocabulary import TERMINAL_STATES
from worker.jobs.failure import fail_submission
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on
from worker.learning.calibration import pooled
from worker.learning.curve import SHUFFLE_NOTE
from worker.learning.fit_readings import curve_summary, fit_gap, search_summary
from worker.learning.pipeline import baseline_description

STATISTICS_NOTE = {
    "std": "sample standard deviation (ddof=1) of the fold scores",
    "naive_interval_95": "mean +/- t(0.975, J-1) * std / sqrt(J) over the J fold scores; naive: it treats "
                         "folds as independent and undercovers (Bates, Hastie, Tibshirani 2024)",
    "clipped": "an end of naive_interval_95 lay outside the metric's range (e.g. above 1 for accuracy, below 0 "
               "for log_loss) and was moved to its edge",
    "sign_stable": "the coefficient has the same strict sign in every fold",
}


def summarize(ctx: WorkerContext, submission_id: str, redis: Redis | None = None) -> dict[str, Any]:
    """Summarise the folds, store the summary; fail the submission when it has nothing to judge.

    When every fold failed with the estimator's own error, that is the submission's result (cause
    "model"). When a planned fold has no record -- its job was lost on every attempt, e.g. each time
    its worker was killed -- the plan is incomplete and no verdict is given (cause "crash");
    ``redis`` is used to stop what remains of the chain.
    """
    work = submission_to_work_on(ctx, submission_id, skip=TERMINAL_STATES)
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    config = ResolvedConfig.from_document(sub["config"])
    rows = submissions.fold_rows(ctx.engine, submission_id)
    document = summary_document(rows, fold_cells(config.validation), config.metrics, str(dataset["task"]))
    document["provenance"] = provenance(config.validation, str(sub["config_fingerprint"]), dataset)
    submissions.store_summary(ctx.engine, submission_id, document)
    ok = sum(1 for r in rows if r["status"] == "ok")
    recorded = {(r["repeat"], r["fold"]) for r in rows}
    lost = [(r, f) for r, f in fold_cells(config.validation) if (r, f) not in recorded]
    if lost:
        named = ", ".join(f"fold {f} of repeat {r}" for r, f in lost[:5]) + (" ..." if len(lost) > 5 else "")
        fail_submission(ctx, redis, submission_id, "crash",
                        f"{len(lost)} of {len(fold_cells(config.validation))} folds were lost ({named}): no result "
                        "was recorded after every attempt (a worker killed or a job lost each time); no verdict is "
                        "given on a partial plan")
    elif ok == 0:
        first = document["failures"][0]["error"] if document["failures"] else "no fold produced a result"
        fail_submission(ctx, redis, submission_id, "model", first)
    return {"submission_id": submission_id, "folds_ok": ok, "folds_failed": len(document["failures"])}


def summary_document(
    rows: Sequence[Mapping[str, Any]], cells: Sequence[tuple[int, int]], metrics: Sequence[str], task: str
) -> dict[str, Any]:
    """Build the summary from fold records; a planned fold with no record counts as failed."""
    recorded = {(r["repeat"], r["fold"]) for r in rows}
    ok = [r for r in rows if r["status"] == "ok"]
    failures = [{"repeat": r["repeat"], "fold": r["fold"], "error": r["error"]} for r in rows
                if r["status"] != "ok"]
    failures += [{"repeat": r, "fold": f, "error": "no result was recorded: the fold job crashed or was lost"}
                 for r, f in cells if (r, f) not in recorded]
    failures.sort(key=lambda x: (x["repeat"], x["fold"]))
    curve = curve_summary(ok, metrics)
    return {
        "summary": {m: metric_summary([r["scores"].get(m) for r in ok], spec_of(m).bounds) for m in metrics},
        "statistics": STATISTICS_NOTE,
        "folds_ok": len(ok),
        "failures": failures,
        "coefficients": coefficient_summary([r["coefficients"] for r in ok if r.get("coefficients")]),
        "fit_gap": fit_gap(ok, metrics),
        "learning_curve": curve,
        "learning_curve_note": SHUFFLE_NOTE if curve else None,
        "search": search_summary(ok, metrics),
        "calibration": pooled(ok),
        "baseline": {
            **baseline_description(task),
            "folds": "the folds where the candidate succeeded",
            "summary": {m: within(describe([(r["baseline_scores"] or {}).get(m) for r in ok]), spec_of(m).bounds)
                        for m in metrics},
        },
    }


Bounds = tuple[float | None, float | None]


def metric_summary(values: Sequence[float | None], bounds: Bounds = (None, None)) -> dict[str, Any]:
    """Describe one metric's fold scores; ``undefined`` counts the folds whose score is None, left out."""
    return {**within(describe(values), bounds), "undefined": sum(v is None for v in values)}


def describe(values: Sequence[float | None]) -> dict[str, Any]:
    """Return n, mean, std (ddof=1), min, max and the naive 95 % interval of the defined values."""
    x = np.asarray([v for v in values if v is not None], dtype=np.float64)
    n = int(x.size)
    if n == 0:
        return {"n": 0, "mean": None, "std": None, "min": None, "max": None, "naive_interval_95": None}
    mean = float(x.mean())
    std = float(x.std(ddof=1)) if n > 1 else None
    interval = None
    if std is not None:
        half = t_975(n - 1) * std / math.sqrt(n)
        interval = [mean - half, mean + half]
    return {"n": n, "mean": mean, "std": std, "min": float(x.min()), "max": float(x.max()),
            "naive_interval_95": interval}


@lru_cache(maxsize=256)
def t_975(df: int) -> float:
    """t(0.975, df): the same few degrees of freedom come back for every term of every summary, and scipy's
    ``ppf`` costs some 0.1 ms a call (a summary of 10 coefficients makes 15 calls)."""
    return float(stats.t.ppf(0.975, df))


def within(described: dict[str, Any], bounds: Bounds) -> dict[str, Any]:
    """Clip a ``describe`` result's interval to ``bounds`` (lowest, highest; None: no limit); say if it moved.

    A metric cannot leave its range (accuracy above 1, log loss below 0), so neither can a
    plausible value of its mean; the symmetric t-interval ignores that near a bound.
    """
    interval = described["naive_interval_95"]
    if interval is None:
        return {**described, "clipped": False}
    lowest, highest = bounds
    low = interval[0] if lowest is None else max(interval[0], lowest)
    high = interval[1] if highest is None else min(interval[1], highest)
    return {**described, "naive_interval_95": [low, high], "clipped": [low, high] != interval}


def coefficient_summary(per_fold: Sequence[Mapping[str, Any]]) -> dict[str, Any] | None:
    """Align the folds' coefficients by (output, name) and describe each term's spread and sign."""
    if not per_fold:
        return None
    order: dict[tuple[str, str], None] = {}
    tables: list[dict[tuple[str, str], float]] = []
    intercepts: dict[str, list[float | None]] = {}
    for k, fold in enumerate(per_fold):
        table = {}
        for output, row in zip(fold["outputs"], fold["values"], strict=True):
            for name, value in zip(fold["names"], row, strict=True):
                table[(output, name)] = value
                order.setdefault((output, name), None)
        tables.append(table)
        for output, value in zip(fold["outputs"], fold["intercept"], strict=False):
            intercepts.setdefault(output, [None] * len(per_fold))[k] = value
    terms = []
    for key in order:
        values = [t.get(key) for t in tables]
        terms.append({"output": key[0], "name": key[1], "values": values, **_spread(values),
                      "sign_stable": _sign_stable(values)})
    return {
        "folds": len(per_fold),
        "outputs": list(dict.fromkeys(o for o, _ in order)),
        "terms": terms,
        "intercept": [{"output": o, "values": v, **_spread(v)} for o, v in intercepts.items()],
    }


def _spread(values: Sequence[float | None]) -> dict[str, Any]:
    described = describe(values)
    return {k: described[k] for k in ("mean", "std", "min", "max")}


def _sign_stable(values: Sequence[float | None]) -> bool | None:
    if len(values) < 2:
        return None  # one fold says nothing about stability
    if any(v is None for v in values):
        return False  # absent in a fold (e.g. a category unseen in its training rows)
    signs = {math.copysign(1.0, v) if v != 0 else 0.0 for v in values if v is not None}
    return len(signs) == 1 and 0.0 not in signs


def provenance(validation: ValidationPlan, config_fingerprint: str, dataset: Mapping[str, Any]) -> dict[str, Any]:
    """Say what produced the result: data and configuration fingerprints, the fold plan, versions."""
    return {
        "dataset_fingerprint": dataset["fingerprint"],
        "development_fingerprint": dataset["development_fingerprint"],
        "config_fingerprint": config_fingerprint,
        "fold_plan": {"scheme": validation.scheme, "folds": validation.folds, "seed": validation.seed,
                      "repeats": validation.repeats},
        "versions": {
            "sealfold": service.__version__, "python": platform.python_version(),
            "scikit-learn": sklearn.__version__, "numpy": np.__version__, "pandas": pd.__version__,
            "scipy": scipy.__version__, "catalog_scikit-learn": load_catalog().sklearn_version,
        },
    }
