"""Warn a submitter, when the submission is accepted, about folds its scores will be read from.

A warning does not stop a submission: the folds still run and are scored against every class of
the dataset. It tells the submitter, before any result, which folds train a model that never saw
a class, so a low or undefined score there is read for what it is. Only development rows are
read; the holdout contributes nothing.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.errors import SealfoldError
from service.settings import Settings
from service.submission.resolved import ValidationPlan
from service.vault import store
from service.vault.folds import (
    check_split_request,
    classes_missing_from_training,
    fold_assignment,
    split_keys_from_frame,
)


def fold_plan_warnings(
    settings: Settings, dataset: Mapping[str, Any], validation: ValidationPlan
) -> list[dict[str, Any]]:
    """Return the warnings about a configuration's fold plan on this dataset (empty when there are none)."""
    if dataset["task"] != "classification" or validation.scheme == "stratified":
        return []  # a stratified plan trains every fold on every class (see classes_missing_from_training)
    plan = validation.fold_plan()
    repeats = validation.repeats
    target, group, time = dataset["target"], dataset.get("group_column"), dataset.get("time_column")
    frame = store.load_development_frame(settings, dataset["id"], columns=[c for c in (target, group, time) if c])
    try:
        keys = split_keys_from_frame(frame, plan, target, group, time)
        check_split_request(plan, keys, repeats)
    except SealfoldError:
        return []  # a plan the rows cannot carry fails its fold jobs with the reason
    assert keys.y is not None
    folds = []
    for repeat in range(repeats):
        assignment = store.load_fold_assignment(settings, dataset["id"], plan, repeat, keys.n_rows)
        if assignment is None:
            assignment = fold_assignment(plan, keys, repeat)
        folds.extend(classes_missing_from_training(plan, keys.y, assignment, repeat))
    if not folds:
        return []
    lacking = sorted({c for f in folds for c in f["missing_classes"]})
    named = ", ".join(lacking[:5]) + (f" and {len(lacking) - 5} more" if len(lacking) > 5 else "")
    detail = (f"{len(folds)} of {plan.folds * repeats} training folds of this {plan.scheme} fold plan lack a class "
              f"({named}): their models never see it, so they cannot predict it; their scores still "
              "count every class of the dataset, and a metric the test rows leave undefined is reported as null "
              "with the reason")
    return [{"code": "class_missing_from_training", "detail": detail, "folds": folds}]
