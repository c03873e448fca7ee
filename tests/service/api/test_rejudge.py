"""Re-judging under a changed policy: the verdict from the stored fold scores, its history, its holdout accounting.

The decisions themselves are the rules' (tests/service/gate/test_verdict.py checks them against published
values); here the checks are what a re-judge may do: recompute from the stored folds, keep every verdict
with its policy version, never show the raw holdout score, and read only what was released (so a re-judge
asks nothing new of the sealed rows and spends no budget).
"""

from __future__ import annotations

import dataclasses
import json
from typing import TYPE_CHECKING, Any

import pytest
from redis import Redis

from service.records import audit, holdout_releases
from tests.support.reviews import RAW_HOLDOUT, make_submission

if TYPE_CHECKING:
    from tests.support.api import Api

@pytest.fixture(autouse=True)
def real_redis(api: Api, redis_url: str) -> None:
    """A re-judge takes the dataset's release lock, a Lua script that fakeredis does not run: a real redis-server."""
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, redis=Redis.from_url(redis_url))


SCORES = [55.0, 57.0, 54.0, 56.0, 58.0]  # rmse per fold; the baseline's are 1.3 times these


def _sub(api: Api, dataset: dict[str, Any], **kwargs: Any) -> str:
    return make_submission(api.engine, dataset, api.key_ids["submitter"], scores=SCORES, **kwargs)


def _policy(api: Api, dataset: dict[str, Any], body: dict[str, Any]) -> int:
    reply = api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json=body)
    assert reply.status_code == 200, reply.get_data(as_text=True)
    return int(reply.get_json()["version"])


def _rejudge(api: Api, sub_id: str, who: str = "steward") -> dict[str, Any]:
    reply = api.post(who, f"/v1/submissions/{sub_id}/verdicts")
    assert reply.status_code == 200, reply.get_data(as_text=True)
    assert str(RAW_HOLDOUT) not in reply.get_data(as_text=True)
    return dict(reply.get_json())


def _gap(doc: dict[str, Any]) -> dict[str, Any]:
    return next(r for r in doc["verdict"]["rules"] if r["rule"] == "holdout_gap")


def test_a_new_bar_is_applied_by_a_rejudge_and_every_verdict_is_kept(api: Api, dataset: dict[str, Any]) -> None:
    sub = _sub(api, dataset, label="ridge")
    version = _policy(api, dataset, {"bar": 50.0})  # every fold is above 50: the CV mean misses the bar
    doc = _rejudge(api, sub)
    assert doc["rejudged"] is True and doc["before"] == {"decision": "pass", "policy_version": 0, "champion": None}
    assert doc["after"]["policy_version"] == version and doc["verdict"]["policy_version"] == version
    assert doc["verdict"]["decision"] == "fail"
    bar = next(r for r in doc["verdict"]["rules"] if r["rule"] == "bar")
    assert bar["outcome"] == "fail" and bar["figures"]["cv_mean"] == sum(SCORES) / len(SCORES)

    history = api.get("submitter", f"/v1/submissions/{sub}/verdicts").get_json()
    assert [h["policy_version"] for h in history["history"]] == [0, version]
    assert [h["judged_by"] for h in history["history"]] == ["system", api.key_ids["steward"]]
    assert history["judged_under_policy_in_force"] is True and history["policy_version_in_force"] == version
    served = api.get("submitter", f"/v1/submissions/{sub}").get_json()
    assert served["result"]["verdict"] == doc["verdict"]
    entry = api.get("submitter", f"/v1/datasets/{dataset['id']}/board").get_json()["entries"][0]
    assert entry["policy_version"] == version and entry["verdict"] == "fail"
    assert entry["judged_under_policy_in_force"] is True
    events = [e for e in audit.events_for(api.engine, sub) if e["action"] == "submission.rejudged"]
    assert len(events) == 1 and events[0]["actor"] == api.key_ids["steward"]

    again = _rejudge(api, sub)  # nothing changed since: no new verdict
    assert again["rejudged"] is False and "already judged" in again["note"]
    assert len(api.get("steward", f"/v1/submissions/{sub}/verdicts").get_json()["history"]) == 2


def test_a_rejudge_reads_only_what_was_released_and_spends_nothing(api: Api, dataset: dict[str, Any]) -> None:
    sub = _sub(api, dataset)  # released exactly: its own figure, the CV mean rounded (56.0)
    spent = holdout_releases.spent_times(api.engine, dataset["id"])
    _policy(api, dataset, {"holdout_gap": {"k_std": 4.0, "floor": 1.0}})
    doc = _rejudge(api, sub)
    # The stored raw holdout score (987.65) lies far outside CV mean 56 +/- 4 x spread and would fail the rule;
    # the rule reads the released figure (56.0), which passes, so nothing new about the sealed rows leaves.
    assert doc["holdout_spent"] == 0 and _gap(doc)["outcome"] == "pass"
    assert holdout_releases.spent_times(api.engine, dataset["id"]) == spent

    withheld = _sub(api, dataset, released=None)  # nothing of its own was released (its query spent a unit)
    spent = holdout_releases.spent_times(api.engine, dataset["id"])
    rule = _gap(_rejudge(api, withheld))
    assert rule["outcome"] == "skipped" and rule["figures"]["withheld"] is True
    assert holdout_releases.spent_times(api.engine, dataset["id"]) == spent


def test_rejudge_is_for_stewards_of_the_team_and_for_judged_submissions(api: Api, dataset: dict[str, Any]) -> None:
    sub = _sub(api, dataset)
    api.problem(api.post("submitter", f"/v1/submissions/{sub}/verdicts"), 403)
    api.problem(api.post("other_steward", f"/v1/submissions/{sub}/verdicts"), 404)
    api.problem(api.post(None, f"/v1/submissions/{sub}/verdicts"), 401)
    queued = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=None, decision=None)
    problem = api.problem(api.post("steward", f"/v1/submissions/{queued}/verdicts"), 409)
    assert "queued" in problem["detail"]
    _policy(api, dataset, {"primary_metric": "mae"})  # the stored folds have rmse only
    problem = api.problem(api.post("steward", f"/v1/submissions/{sub}/verdicts"), 409)
    assert "'mae' in its metrics" in problem["detail"]


def test_a_dataset_is_rejudged_a_page_at_a_time(api: Api, dataset: dict[str, Any]) -> None:
    subs = [_sub(api, dataset, label=f"model {i}") for i in range(3)]
    version = _policy(api, dataset, {"bar": 56.5})
    path = f"/v1/datasets/{dataset['id']}/verdicts"
    api.problem(api.post("submitter", path, json={}), 403)
    api.problem(api.post("steward", path, json={"limit": 0}), 422)
    first = api.post("steward", path, json={"limit": 2}).get_json()
    assert first["policy_version"] == version and first["next_after"] is not None
    second = api.post("steward", path, json={"limit": 2, "after": first["next_after"]}).get_json()
    assert second["next_after"] is None
    results = first["results"] + second["results"]
    assert sorted(r["submission"] for r in results) == sorted(subs)
    assert all(r["rejudged"] and r["after"]["policy_version"] == version for r in results)
    assert api.post("steward", path).get_json()["results"] == []  # no body: the defaults; nothing left
    text = json.dumps(first) + json.dumps(second)
    assert str(RAW_HOLDOUT) not in text


def test_a_resubmission_says_which_policy_judged_it_and_how_to_rejudge(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    from service.records import submissions
    from service.vocabulary import LIVE_STATES
    from tests.support.api import submission_body
    from tests.support.reviews import verdict

    first = api.post("submitter", "/v1/submissions", json=submission_body(dataset, label="ridge v1"),
                     headers={"Idempotency-Key": "first"})
    assert first.status_code == 202 and "resubmission" not in first.get_json()
    sub = first.get_json()["id"]
    submissions.store_verdict(api.engine, sub, verdict("pass"), 0, None)
    submissions.transition(api.engine, sub, "succeeded", LIVE_STATES)
    replay = api.post("submitter", "/v1/submissions", json=submission_body(dataset, label="ridge v1"),
                      headers={"Idempotency-Key": "first"})
    assert replay.status_code == 200 and "resubmission" not in replay.get_json()  # a replay, not a resubmission

    again = api.post("submitter2", "/v1/submissions", json=submission_body(dataset, label="ridge again"))
    assert again.status_code == 200, again.get_data(as_text=True)
    note = again.get_json()["resubmission"]
    assert again.get_json()["id"] == sub and note["submission"] == sub
    assert note["judged_under_policy_version"] == 0 == note["policy_version_in_force"]
    assert note["judged_under_policy_in_force"] is True
    assert note["label_sent"] == "ridge again" and note["label_kept"] == "ridge v1"
    assert "was not kept" in note["message"]
    assert len(worker_says_ok) == 1  # the resubmission was not checked nor run again

    # Under a new policy version the same configuration is a new question (one submission per configuration
    # and policy version): it runs again and is judged under the policy in force; the earlier submission can
    # be re-judged instead, from its stored folds.
    _policy(api, dataset, {"bar": 50.0})
    rerun = api.post("submitter2", "/v1/submissions", json=submission_body(dataset, label="ridge, new policy"))
    assert rerun.status_code == 202 and rerun.get_json()["id"] != sub and "resubmission" not in rerun.get_json()


def test_a_figure_that_is_not_finite_is_stored_as_null_and_the_board_still_ranks(
    api: Api, dataset: dict[str, Any]
) -> None:
    # At a level of 1e-300 the one-sided bound of the paired test is -infinity (scipy's t.ppf); JSON has no
    # infinity, and SQLite's JSON functions refuse a document that holds one.
    sub = _sub(api, dataset)
    _policy(api, dataset, {"baseline_alpha": 1e-300, "holdout_gap": {"floor": 1e308}})
    doc = _rejudge(api, sub)
    baseline = next(r for r in doc["verdict"]["rules"] if r["rule"] == "baseline")
    assert baseline["figures"]["lower_bound"] is None
    board = api.get("submitter", f"/v1/datasets/{dataset['id']}/board")
    assert board.status_code == 200 and board.get_json()["entries"][0]["submission"] == sub
