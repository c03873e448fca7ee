"""Re-judge a finished submission under the policy and champion in force, from its stored evidence.

Nothing is refitted: the fold scores, the baseline's and the plan are stored (``gate.evidence``).
The holdout rules read only what already left: the holdout-gap rule is judged on the submission's own
released figure (``gate.evidence.holdout_reading``: skipped when the figure was withheld or the ladder
released the dataset's best), and the champion decision on the sealed rows is the one made when the
submission was judged, if against the champion now in force (otherwise it was not made, and the rule says
so). A re-judge therefore asks nothing new of the sealed rows and spends no holdout budget.

The released holdout figure is never recomputed nor released again: the submission keeps the one
released when it was first judged, labelled with that policy version. Every verdict is kept
(``records.verdicts``); the newest is the submission's verdict.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from redis import Redis
from redis.exceptions import LockError
from sqlalchemy import Engine

from service.errors import Conflict, Unavailable
from service.gate import evidence as stored_evidence
from service.gate.policy import parse_policy
from service.gate.review_state import policy_in_force
from service.gate.verdict import judge
from service.records import audit, champion_tests, holdout_releases, submissions, verdicts

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
    # The holdout rules read only what was already released or decided: a re-judge asks nothing new of
    # the sealed rows, so it spends nothing.
    figure, hidden, failed = stored_evidence.holdout_reading(holdout_releases.get(engine, sub_id),
                                                             policy.primary_metric)
    verdict = judge(policy, found.candidate, found.baseline, found.champion, figure, found.plan,
                    policy_version=version, holdout_hidden=hidden, holdout_failed=failed,
                    champion_holdout=_sealed_comparison(engine, sub_id, found.champion_id))
    spent = 0
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


def _sealed_comparison(engine: Engine, sub_id: str, champion_id: str | None) -> dict[str, Any] | None:
    """The champion decision on the sealed rows made when the submission was judged, if it was against the
    champion now in force (a new champion would need a new holdout query: the rule then says it was not made)."""
    row = champion_tests.get(engine, sub_id)
    if row is None or champion_id is None or row["champion_id"] != champion_id:
        return None
    return dict(row["entry"])
