"""Make the champion decision on the sealed rows for the verdict job, once per submission.

The candidate's and the champion's per-row values on the sealed rows (kept by the holdout job in the
sealed directory) are compared by service.gate.holdout_champion at the level the dataset's online
procedure gives the next test. It is one holdout query: the verdict job counts it against the
submitter's release budget (one more unit of the release row's ``spent``) and, with no budget left,
no test is made (the rule is inconclusive and the stream does not advance). The decision is stored
once (``records.champion_tests``), so a retried verdict job reuses it. Nothing computed from the rows
leaves: the stored entry holds the outcome, the level and the stream index.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from service.gate import holdout_champion as hc
from service.gate.policy import Policy
from service.records import champion_tests
from worker.jobs.losses import load_per_example, load_scoring_rows
from worker.jobs.runtime import WorkerContext
from worker.learning.scoring import score_predictions


def decide_once(
    ctx: WorkerContext, sub: Mapping[str, Any], dataset: Mapping[str, Any], policy: Policy,
    champion_id: str | None, budget_left: int,
) -> int:
    """Make (or find) the submission's decision; return the budget units it spends (0 or 1).

    The caller holds the dataset's release lock, which orders the stream.
    """
    if champion_id is None or champion_id == sub["id"] or policy.champion_rule == "cv":
        return 0  # nothing to compare, or the policy decides on the folds: no holdout query is spent
    engine = ctx.engine
    existing = champion_tests.get(engine, str(sub["id"]))
    if existing is not None:
        return 0 if existing["seq"] is None else 1
    decides = policy.champion_rule in ("holdout", "both")
    base = {"submission_id": sub["id"], "dataset_id": dataset["id"], "champion_id": champion_id}
    if budget_left < 1:
        entry = hc.not_decided(policy, champion_id, (
            f"Not compared with champion {champion_id} on the sealed rows: the comparison is a holdout query "
            "and this submitter's release budget is spent."), decides=decides)
        champion_tests.record(engine, {**base, "entry": entry})
        return 0
    scoring = _sealed(ctx, dataset, policy, str(sub["id"]), champion_id)
    if scoring is None:
        entry = hc.not_decided(policy, champion_id, (
            f"Cannot compare with champion {champion_id} on the sealed rows: the per-row values of "
            f"{policy.primary_metric} were not kept for both (a champion scored before they were kept)."),
            decides=decides)
        champion_tests.record(engine, {**base, "entry": entry})
        return 0
    mine, theirs, score_rows = scoring
    decision = hc.decide(policy, champion_tests.stream(engine, str(dataset["id"])), mine, theirs,
                         candidate_id=str(sub["id"]), champion_id=champion_id, score_rows=score_rows)
    entry = hc.rule(policy, champion_id, decision, decides=decides)
    champion_tests.record(engine, {**base, "seq": decision.index, "level": decision.level,
                                   "passed": decision.passed, "entry": entry})
    return 1


def recorded_entry(ctx: WorkerContext, submission_id: str) -> dict[str, Any] | None:
    """Return the stored rule entry of a submission's decision, or None when none was made."""
    row = champion_tests.get(ctx.engine, submission_id)
    return None if row is None else dict(row["entry"])


Scoring = tuple[hc.SealedRows, hc.SealedRows, Callable[[np.ndarray], tuple[float, float]] | None]


def _sealed(ctx: WorkerContext, dataset: Mapping[str, Any], policy: Policy, sub_id: str,
            champion_id: str) -> Scoring | None:
    """Load what both models kept on the sealed rows; None when either lacks it."""
    metric, ds = policy.primary_metric, str(dataset["id"])
    if hc.test_form(metric) != "paired_bootstrap":
        mine = load_per_example(ctx.settings, ds, sub_id, metric)
        theirs = load_per_example(ctx.settings, ds, champion_id, metric)
        if mine is None or theirs is None or mine.shape != theirs.shape:
            return None
        return hc.SealedRows(mine, mine.size), hc.SealedRows(theirs, theirs.size), None
    a = load_scoring_rows(ctx.settings, ds, sub_id)
    b = load_scoring_rows(ctx.settings, ds, champion_id)
    if a is None or b is None or a["_y"].shape != b["_y"].shape:
        return None
    n = int(a["_y"].size)

    def score_rows(rows: np.ndarray) -> tuple[float, float]:
        return _score(a, rows, metric), _score(b, rows, metric)

    return hc.SealedRows(None, n), hc.SealedRows(None, n), score_rows


def _score(kept: Mapping[str, np.ndarray], rows: np.ndarray, metric: str) -> float:
    """Score one model's kept predictions on the given rows with scikit-learn's metric (NaN if undefined)."""
    pred = kept["_pred"][rows] if "_pred" in kept else None
    proba = kept["_proba"][rows] if "_proba" in kept else None
    scores, _undefined = score_predictions(kept["_y"][rows], pred, proba, kept.get("_labels"), [metric])
    value = scores.get(metric)
    return math.nan if value is None else float(value)
