"""Re-judge a finished submission under the policy and champion in force, from its stored evidence.

Nothing is refitted: the fold scores, the baseline's and the plan are stored (``gate.evidence``).
The holdout is another matter. The holdout-gap rule reads the sealed score, so its outcome is one
bit about the holdout, and a re-judge may ask that question again:

- Asked before: an earlier verdict of the submission answered the same question (same primary
  metric, ``k_std`` and ``floor``; the fold scores and sizes are the stored ones): its answer is
  reused and nothing new leaves.
- A new question is a holdout query and is counted as the release policy in force counts a
  released figure: one unit of the submission owner's budget (``release.budget`` per
  ``release.window_hours``), taken under the dataset's release lock. With the budget spent, or under
  thresholdout (whose guarantee covers only the answers it gives itself), the rule is not checked
  and reads inconclusive -- never a pass -- saying when to re-judge again.

The released holdout figure is never recomputed nor released again: the submission keeps the one
released when it was first judged, labelled with that policy version. Every verdict is kept
(``records.verdicts``); the newest is the submission's verdict.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from redis import Redis
from redis.exceptions import LockError
from sqlalchemy import Engine

from service.errors import Conflict, Unavailable
from service.gate import evidence as stored_evidence
from service.gate.policy import Policy, parse_policy
from service.gate.release import budget_status
from service.gate.review_state import policy_in_force
from service.gate.verdict import holdout_gap_rule, judge
from service.records import audit, holdout_releases, submissions, verdicts
from service.records.engine import as_utc, utcnow

_EPOCH = datetime(1970, 1, 1)
LOCK_WAIT_SECONDS = 10


def release_lock_name(dataset_id: str) -> str:
    """The Redis lock every holdout release and re-judge of a dataset is made under."""
    return f"sealfold:release:{dataset_id}"


@dataclass(frozen=True)
class Rejudged:
    """What a re-judge did to one submission."""

    submission_id: str
    rejudged: bool
    note: str  # one plain sentence: what changed, or why nothing did
    before: dict[str, Any]  # {"decision", "policy_version", "champion"} of the verdict it replaced
    after: dict[str, Any]
    holdout_spent: int

    def document(self) -> dict[str, Any]:
        return {"submission": self.submission_id, "rejudged": self.rejudged, "note": self.note,
                "before": self.before, "after": self.after, "holdout_spent": self.holdout_spent}


def holdout_spent_at(engine: Engine, dataset_id: str, owner_key_id: str) -> list[datetime]:
    """Return when this owner's holdout budget on the dataset was used: releases and re-judges alike."""
    released = holdout_releases.list_since(engine, dataset_id, _EPOCH, owner_key_id=owner_key_id)
    spent = [as_utc(r["released_at"]) or utcnow() for r in released if r["spent"] > 0]
    return spent + [as_utc(t) or utcnow() for t in verdicts.holdout_spent_at(engine, dataset_id, owner_key_id)]


def rejudge(engine: Engine, redis: Redis, sub_id: str, dataset: Mapping[str, Any], actor_id: str) -> Rejudged:
    """Re-judge one succeeded submission of ``dataset`` under the policy and champion in force."""
    try:
        with redis.lock(release_lock_name(str(dataset["id"])), timeout=60, blocking_timeout=LOCK_WAIT_SECONDS):
            return _rejudge_locked(engine, sub_id, dataset, actor_id)
    except LockError as exc:
        raise Unavailable(f"the holdout accounting of dataset {dataset['id']} stayed busy for "
                          f"{LOCK_WAIT_SECONDS} s; re-judge again in a moment") from exc


def rejudge_dataset(engine: Engine, redis: Redis, dataset: Mapping[str, Any], actor_id: str, *,
                    limit: int, after: str | None) -> tuple[list[Rejudged], str | None]:
    """Re-judge up to ``limit`` submissions judged under another policy version; return them and the next cursor."""
    version = int(policy_in_force(engine, dict(dataset))["version"])
    rows = verdicts.judged_under_other_policy(engine, str(dataset["id"]), version, after, limit + 1)
    done: list[Rejudged] = []
    for row in rows[:limit]:
        try:
            done.append(rejudge(engine, redis, str(row["id"]), dataset, actor_id))
        except Conflict as exc:  # cannot be re-judged (e.g. never computed the new primary metric): say so
            state = _state(row)
            done.append(Rejudged(str(row["id"]), False, exc.detail, state, state, 0))
    return done, (str(rows[limit - 1]["id"]) if len(rows) > limit else None)


def _rejudge_locked(engine: Engine, sub_id: str, dataset: Mapping[str, Any], actor_id: str) -> Rejudged:
    sub = submissions.get(engine, sub_id)
    if sub is None or sub["dataset_id"] != dataset["id"]:
        raise Conflict(f"submission {sub_id} is not on dataset {dataset['id']}")
    if sub["state"] != "succeeded" or sub["verdict"] is None:
        why = sub["error"] if sub["state"] == "failed" and sub["error"] else f"it is {sub['state']}"
        raise Conflict(f"submission {sub_id} has no verdict to re-judge ({why}); only a submission that "
                       "succeeded and was judged can be re-judged")
    stated = policy_in_force(engine, dict(dataset))
    version, policy = int(stated["version"]), parse_policy(stated, str(dataset["task"]))
    found = stored_evidence.gather(engine, sub, dataset, policy.primary_metric)
    if not found.candidate:
        raise Conflict(f"submission {sub_id} computed no {policy.primary_metric} fold scores, the primary metric "
                       f"of policy version {version}; submit the configuration again with "
                       f"{policy.primary_metric!r} in its metrics to have it judged")
    before = _state(sub)
    if sub["policy_version"] == version and sub["champion_id"] == found.champion_id:
        return Rejudged(sub_id, False, f"already judged under policy version {version} against the champion in "
                        "force; nothing to re-judge", before, before, 0)
    rule, spent = _holdout_rule(engine, sub, policy, found)
    verdict = judge(policy, found.candidate, found.baseline, found.champion, None, found.plan,
                    policy_version=version, holdout_rule=rule)
    submissions.store_verdict(engine, sub_id, verdict, version, found.champion_id, judged_by=actor_id,
                              holdout_spent=spent)
    after = {"decision": verdict["decision"], "policy_version": version, "champion": found.champion_id}
    audit.record(engine, actor_id, str(sub["team"]), "submission.rejudged", sub_id,
                 {"before": before, "after": after, "holdout_spent": spent})
    return Rejudged(sub_id, True, f"re-judged under policy version {version}: {before['decision']} under "
                    f"version {before['policy_version']}, now {verdict['decision']}", before, after, spent)


def _state(sub: Mapping[str, Any]) -> dict[str, Any]:
    return {"decision": (sub["verdict"] or {}).get("decision"), "policy_version": sub["policy_version"],
            "champion": sub["champion_id"]}


def _holdout_rule(engine: Engine, sub: Mapping[str, Any], policy: Policy,
                  found: stored_evidence.Evidence) -> tuple[dict[str, Any] | None, int]:
    """Return the holdout-gap rule to use (None: check it now) and the budget units that uses."""
    gap = policy.holdout_gap
    question = (policy.primary_metric, float(gap.k_std), float(gap.floor))
    for earlier in reversed(verdicts.history(engine, str(sub["id"]))):
        answered = _answered(earlier["verdict"], question)
        if answered is not None:
            return answered, 0
    raw = submissions.get_holdout(engine, str(sub["id"]))
    holdout = None if raw is None or raw.get("error") else (raw["scores"] or {}).get(policy.primary_metric)
    if holdout is None or len(found.candidate) < 2:
        # Skipped, or inconclusive for want of folds: the rule reads nothing of the holdout then.
        return holdout_gap_rule(policy, found.candidate, found.plan, holdout), 0
    if policy.release.mode == "thresholdout":
        return _withheld(policy, "under thresholdout a holdout answer is given only by the mechanism itself", None), 0
    params = policy.release
    spent_at = holdout_spent_at(engine, str(sub["dataset_id"]), str(sub["owner_key_id"]))
    budget = budget_status(spent_at, utcnow(), params.budget, params.window_hours)
    if budget.remaining == 0:
        return _withheld(policy, f"the submitter's {params.budget} holdout releases per "
                         f"{params.window_hours:g} hours on this dataset are used up", budget.returns_at), 0
    return holdout_gap_rule(policy, found.candidate, found.plan, float(holdout)), 1


def _answered(verdict: Mapping[str, Any], question: tuple[str, float, float]) -> dict[str, Any] | None:
    """Return an earlier verdict's holdout-gap rule if it answered exactly this question, else None."""
    if verdict.get("primary_metric") != question[0]:
        return None
    for rule in verdict.get("rules") or []:
        if rule.get("rule") != "holdout_gap":
            continue
        figures = rule.get("figures") or {}
        same = (figures.get("k_std"), figures.get("floor")) == question[1:]
        return dict(rule) if same and not figures.get("withheld") else None
    return None


def _withheld(policy: Policy, why: str, returns_at: datetime | None) -> dict[str, Any]:
    gap = policy.holdout_gap
    when = f"; re-judge again after {returns_at.isoformat()}" if returns_at is not None else ""
    return {"rule": "holdout_gap", "outcome": "inconclusive", "sentence": (
        f"Not checked whether the holdout score is consistent with CV under this policy ({gap.k_std:g} x expected "
        f"spread + floor {gap.floor:g}): no earlier verdict answered it, so it would be a new question about the "
        f"holdout, and {why}{when}."),
        "figures": {"k_std": gap.k_std, "floor": gap.floor, "withheld": True,
                    "available_from": None if returns_at is None else returns_at.isoformat()}}
