"""Score the champion's configuration on one fold of a candidate's plan, so the CV comparison stays paired.

A candidate that runs another fold plan than the champion (the 5x2cv option, a fold-count
override) shares no folds with it, and the champion rule could only say "inconclusive". So the
champion's configuration is fitted and scored here on the candidate's splits, one job per cell
(``<sub>-champion-<repeat>-<fold>``), and stored per (champion, plan, repeat, fold)
(``records.champion_folds``): a later candidate on the same plan finds the cells and runs nothing.
It reads development rows only and runs in a work horse like any job the worker does not keep
in-process. An estimator error is the cell's result, as in a fold job; the verdict job leaves such
cells out of the paired test.
"""

from __future__ import annotations

from typing import Any

from service.records import champion_folds, submissions
from service.submission.resolved import ResolvedConfig
from service.vocabulary import TERMINAL_STATES
from worker.jobs.fold import evaluate_fold
from worker.jobs.runtime import Skip, WorkerContext, submission_to_work_on
from worker.learning.development import column_kinds, load_development, split_for
from worker.learning.pipeline import build_pipeline
from worker.learning.scoring import class_labels
from worker.learning.search import build_model


def plan_of(config: ResolvedConfig) -> str:
    """Return the stored name of a configuration's fold plan."""
    plan = config.validation.fold_plan()
    return champion_folds.plan_name((plan.scheme, plan.folds, plan.seed))


def run_champion_fold(
    ctx: WorkerContext, submission_id: str, champion_id: str, repeat: int, fold: int,
) -> dict[str, Any]:
    """Score the champion on one cell of the submission's plan, unless that cell is already stored."""
    echo = {"champion_id": champion_id, "repeat": repeat, "fold": fold}
    work = submission_to_work_on(ctx, submission_id, skip=TERMINAL_STATES, echo=echo)
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    config = ResolvedConfig.from_document(sub["config"])
    plan = plan_of(config)
    stored = {(r["repeat"], r["fold"]) for r in champion_folds.rows(ctx.engine, champion_id, plan)}
    if (repeat, fold) in stored:
        return {"submission_id": submission_id, **echo, "champion_fold": "cached"}
    champion = submissions.get(ctx.engine, champion_id)
    if champion is None or champion["dataset_id"] != dataset["id"]:
        raise ValueError(f"champion {champion_id} is not a submission on dataset {dataset['id']}")
    theirs = ResolvedConfig.from_document(champion["config"])
    data, keys = load_development(ctx.settings, dataset, theirs.model.features)
    # The candidate's split: the plan's assignment depends on the key columns only, not the features.
    split = split_for(ctx.settings, dataset, config.validation, keys, repeat, fold)
    classes = class_labels(data.y) if dataset["task"] == "classification" else None
    model = build_model(build_pipeline(theirs.model, column_kinds(dataset)), theirs, classes)
    outcome = evaluate_fold(model, data, split, str(dataset["task"]), config.metrics, linear=False,
                            target=str(dataset["target"]), classes=classes)
    created = champion_folds.record(
        ctx.engine, champion_id, plan, repeat, fold, status=outcome["status"], scores=outcome["scores"],
        train_rows=outcome["train_rows"], test_rows=outcome["test_rows"], error=outcome["error"])
    return {"submission_id": submission_id, **echo, "champion_fold": "scored" if created else "cached",
            "status": outcome["status"]}
