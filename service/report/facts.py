"""Gather what the report page of one submission shows, from the records alone.

The champion's fold scores are shown beside the candidate's only when both were scored on the
same folds (same plan, seed and repeats), because only then does "fold 3" mean the same rows.
The holdout figure is the released one (``review_state.holdout_part``), never the raw score.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import Engine

from service.catalog.metrics import METRICS, metric_name
from service.gate.review_state import holdout_part, policy_in_force
from service.records import champions, datasets, holdout_releases, keys, submissions

_PLAN_KEYS = ("scheme", "folds", "seed", "repeats")


@dataclass(frozen=True)
class ChampionFacts:
    """The champion compared with: its id and label, and its fold scores when the folds are the same."""

    submission_id: str
    label: str
    judged_against: bool  # the verdict compared with it (else: it is merely the champion now)
    fold_scores: dict[tuple[int, int], float | None] | None
    mean: float | None
    note: str = ""


@dataclass(frozen=True)
class ReportFacts:
    """Everything the page renders, already read from the records."""

    submission: dict[str, Any]
    dataset: dict[str, Any]
    submitter: str
    folds: list[dict[str, Any]]
    summary: dict[str, Any]
    verdict: dict[str, Any] | None
    primary_metric: str
    greater_is_better: bool
    policy: dict[str, Any]
    policy_matches_verdict: bool
    holdout: dict[str, Any]
    champion: ChampionFacts | None
    metrics: list[str] = field(default_factory=list)

    @property
    def cells(self) -> list[tuple[int, int]]:
        """The (repeat, fold) cells of the candidate's plan, in order."""
        validation = self.submission["config"]["validation"]
        return [(r, f) for r in range(int(validation.get("repeats", 1))) for f in range(int(validation["folds"]))]


def gather(engine: Engine, row: dict[str, Any]) -> ReportFacts:
    """Read the facts of the report of submission ``row`` (already checked to be the caller's team's)."""
    dataset = datasets.get(engine, row["dataset_id"])
    if dataset is None:  # a foreign key guarantees it; kept for the type checker
        raise LookupError(f"submission {row['id']} refers to dataset {row['dataset_id']!r}, which is gone")
    policy = policy_in_force(engine, dataset)
    verdict = row.get("verdict")
    primary = str((verdict or {}).get("primary_metric") or policy["primary_metric"])
    spec = METRICS.get(metric_name(primary))
    owner = keys.get_key(engine, row["owner_key_id"])
    return ReportFacts(
        submission=row,
        dataset=dataset,
        submitter=owner.name if owner is not None and owner.name else row["owner_key_id"],
        folds=submissions.fold_rows(engine, row["id"]),
        summary=row.get("cv_summary") or {},
        verdict=verdict,
        primary_metric=primary,
        greater_is_better=bool(spec.greater_is_better) if spec is not None else bool(policy["greater_is_better"]),
        policy=policy,
        policy_matches_verdict=verdict is not None and row.get("policy_version") == policy["version"],
        holdout=holdout_part(None if row.get("held_back") else holdout_releases.get(engine, row["id"]), row["state"],
                             row.get("policy_version")),
        champion=_champion(engine, row, primary),
        metrics=list(row["config"].get("metrics", [])),
    )


def _champion(engine: Engine, row: dict[str, Any], metric: str) -> ChampionFacts | None:
    judged = row.get("verdict") is not None
    champion_id = row.get("champion_id") if judged else champions.current(engine, row["dataset_id"])
    if not champion_id or champion_id == row["id"]:
        return None
    champion = submissions.get(engine, champion_id)
    if champion is None:
        return None
    mean = ((champion.get("cv_summary") or {}).get("summary") or {}).get(metric, {}).get("mean")
    mine = {k: row["config"]["validation"].get(k) for k in _PLAN_KEYS}
    theirs = {k: champion["config"]["validation"].get(k) for k in _PLAN_KEYS}
    if mine != theirs:
        return ChampionFacts(champion_id, champion["label"], judged, None, mean,
                             "the champion was scored on other folds, so its fold scores are not paired with "
                             "these and are not shown")
    scores = {(f["repeat"], f["fold"]): (f["scores"] or {}).get(metric) if f["status"] == "ok" else None
              for f in submissions.fold_rows(engine, champion_id)}
    return ChampionFacts(champion_id, champion["label"], judged, scores, mean)
