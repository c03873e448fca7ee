"""Gather what a verdict is judged on from the records: fold scores, the baseline's, the champion's, the plan.

One place for the verdict job and a steward's re-judge, so a re-judged verdict reads exactly the
stored evidence the first one read; nothing is refitted and no sealed row is touched.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine

from service.gate.release import FAILED, RELEASED, WITHHELD
from service.gate.verdict import CORRECTED_RESAMPLED_T, FIVE_BY_TWO_CV, ChampionFolds, PlanFacts
from service.records import champion_folds as replays
from service.records import champions, submissions
from service.submission.resolved import ValidationPlan

Cell = tuple[int, int]


@dataclass(frozen=True)
class Evidence:
    """A submission's stored primary-metric fold scores, its baseline's, its plan and the champion in force."""

    candidate: Mapping[Cell, float]
    baseline: Mapping[Cell, float]
    plan: PlanFacts
    champion: ChampionFolds | None
    champion_id: str | None  # the champion it is judged against (None: none, or the submission itself)
    folds: list[dict[str, Any]]  # the fold rows that scored (status ok)


def gather(engine: Engine, sub: Mapping[str, Any], dataset: Mapping[str, Any], metric: str) -> Evidence:
    """Read a submission's evidence for ``metric`` and the dataset's champion in force."""
    folds = [row for row in submissions.fold_rows(engine, str(sub["id"])) if row["status"] == "ok"]
    validation = ValidationPlan.from_document(sub["config"]["validation"])
    plan = PlanFacts(
        key=plan_key(validation),
        sizes={(r["repeat"], r["fold"]): (r["train_rows"], r["test_rows"]) for r in folds},
        overridden=validation.plan_overridden,
        test=FIVE_BY_TWO_CV if validation.test == "5x2cv" else CORRECTED_RESAMPLED_T,
        holdout_rows=int(dataset["rows_holdout"]),
    )
    champion_id = champions.current(engine, str(dataset["id"]))
    champion = None if champion_id in (None, sub["id"]) else champion_folds(engine, str(champion_id), metric,
                                                                                 validation)
    return Evidence(cells(folds, "scores", metric), cells(folds, "baseline_scores", metric), plan, champion,
                    None if champion is None else champion.submission_id, folds)


def plan_key(validation: ValidationPlan) -> tuple[str, int, int]:
    """Return the fold plan as (scheme, folds, seed): equal keys mean identical splits per repeat."""
    plan = validation.fold_plan()
    return plan.scheme, plan.folds, plan.seed


def cells(folds: list[dict[str, Any]], column: str, metric: str) -> dict[Cell, float]:
    """Return {(repeat, fold): score} of ``metric`` in a fold-row column, for the cells that have it."""
    values = ((row["repeat"], row["fold"], (row[column] or {}).get(metric)) for row in folds)
    return {(r, f): float(v) for r, f, v in values if v is not None}


def champion_folds(engine: Engine, champion_id: str, metric: str, mine: ValidationPlan) -> ChampionFolds | None:
    """Return the champion's primary-metric fold scores: its own, or on the candidate's plan when that differs.

    The champion's configuration scored on the candidate's plan (``worker.jobs.champion_fold``, cached per
    plan in ``records.champion_folds``) keeps the comparison paired; without those scores the plans differ
    and the champion rule says so. None when the champion's record is gone.
    """
    champ = submissions.get(engine, champion_id)
    if champ is None:
        return None
    validation = ValidationPlan.from_document(champ["config"]["validation"])
    rows = [r for r in submissions.fold_rows(engine, champion_id) if r["status"] == "ok"]
    own, key = plan_key(validation), plan_key(mine)
    if own != key:
        replayed = [r for r in replays.rows(engine, champion_id, replays.plan_name(key)) if r["status"] == "ok"]
        if replayed:
            return ChampionFolds(submission_id=champion_id, scores=cells(replayed, "scores", metric), plan_key=key,
                                 replayed=True)
    return ChampionFolds(submission_id=champion_id, scores=cells(rows, "scores", metric), plan_key=own)


def holdout_reading(told: Mapping[str, Any] | None, metric: str) -> tuple[float | None, str | None, bool]:
    """Return what the holdout rule may read of a release row: (own released figure, why hidden, failed told).

    Never the raw score: the rule's pass/fail is a bit about the holdout, so it is judged on the figure as
    released when that is the submission's own answer, and withheld otherwise. A re-judge reads the same,
    so it asks nothing new of the holdout and spends nothing.
    """
    if told is None:
        return None, "no holdout answer was released for this submission", False
    outcome = told.get("outcome") or (RELEASED if told["released"] is not None else WITHHELD)
    if outcome == FAILED:
        return None, None, True
    if outcome == WITHHELD:
        return None, "the holdout figure is withheld under the release policy, and so is anything judged on it", False
    if told["mode"] == "ladder":
        return None, ("the ladder releases the dataset's best figure so far, not this submission's own, and the "
                      "rule would tell about that"), False
    value = (told["released"] or {}).get(metric)
    return (None if value is None else float(value)), None, False
