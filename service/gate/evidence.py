"""Gather what a verdict is judged on from the records: fold scores, the baseline's, the champion's, the plan.

One place for the verdict job and a steward's re-judge, so a re-judged verdict reads exactly the
stored evidence the first one read; nothing is refitted and no sealed row is touched.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine

from service.gate.verdict import CORRECTED_RESAMPLED_T, FIVE_BY_TWO_CV, ChampionFolds, PlanFacts
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
    champion = None if champion_id in (None, sub["id"]) else champion_folds(engine, str(champion_id), metric)
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


def champion_folds(engine: Engine, champion_id: str, metric: str) -> ChampionFolds | None:
    """Return the champion's primary-metric fold scores and plan, or None when its record is gone."""
    champ = submissions.get(engine, champion_id)
    if champ is None:
        return None
    validation = ValidationPlan.from_document(champ["config"]["validation"])
    rows = [r for r in submissions.fold_rows(engine, champion_id) if r["status"] == "ok"]
    return ChampionFolds(submission_id=champion_id, scores=cells(rows, "scores", metric), plan_key=plan_key(validation))
