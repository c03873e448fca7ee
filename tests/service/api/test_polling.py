"""Polling a submission with If-None-Match: a 304 only while the document is unchanged, only to its team.

The rules checked are RFC 9110's: a GET whose If-None-Match matches the current entity tag (weak
comparison, section 13.1.2) is answered 304 without a body and with the same ETag (section 15.4.5);
a strong ETag changes whenever the representation does (section 8.8.3).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import pytest

from service.records import holdout_releases, submissions
from service.records.engine import utcnow
from service.records.tables import fold_results
from service.submission.document import submission_document
from service.submission.recent_documents import RecentDocuments
from service.vocabulary import LIVE_STATES

if TYPE_CHECKING:
    from tests.support.api import Api


def _read(api: Api, sub_id: str, etag: str | None = None) -> Any:
    headers = {} if etag is None else {"If-None-Match": etag}
    return api.get("submitter", f"/v1/submissions/{sub_id}", headers=headers)


def _fold(api: Api, sub_id: str, fold: int) -> None:
    submissions.record_fold(api.engine, sub_id, 0, fold, status="ok", train_rows=282, test_rows=71,
                            scores={"rmse": 55.0 + fold, "r2": 0.45}, baseline_scores={"rmse": 77.0, "r2": 0.0},
                            coefficients=None, fit_seconds=0.01, score_seconds=0.001)


def _fold_row_only(api: Api, sub_id: str, fold: int) -> None:
    # A fold row stored without touching the submission row: its count alone must move the ETag.
    with api.engine.begin() as conn:
        conn.execute(fold_results.insert().values(
            submission_id=sub_id, repeat=0, fold=fold, status="ok", train_rows=282, test_rows=71,
            scores={"rmse": 56.0, "r2": 0.44}, baseline_scores={"rmse": 77.0, "r2": 0.0}, finished_at=utcnow()))


def _lifecycle(api: Api, sub_id: str, dataset_id: str) -> list[tuple[str, Callable[[], object]]]:
    owner = submissions.get(api.engine, sub_id)["owner_key_id"]  # type: ignore[index]
    stats = {"mean": 57.0, "std": 1.6, "min": 55.0, "max": 59.0, "naive_interval_95": [55.0, 59.0]}
    summary = {"summary": {"rmse": stats}, "baseline": {"estimator": "DummyRegressor", "summary": {"rmse": stats}},
               "coefficients": None}
    verdict = {"decision": "pass", "reasons": ["beats the baseline"], "rules": []}
    steps: list[tuple[str, Callable[[], object]]] = [
        ("running", lambda: submissions.mark_running(api.engine, sub_id)),
        *((f"fold {f}", lambda f=f: _fold(api, sub_id, f)) for f in range(4)),
        ("a fold row alone", lambda: _fold_row_only(api, sub_id, 4)),
        ("summary", lambda: submissions.store_summary(api.engine, sub_id, summary)),
        # The raw holdout score is stored but not shown: the document does not change.
        ("holdout scored", lambda: submissions.store_holdout_once(api.engine, sub_id, {"rmse": 56.5123}, "h" * 64,
                                                                  0.02)),
        ("holdout released", lambda: holdout_releases.record(api.engine, {
            "submission_id": sub_id, "dataset_id": dataset_id, "owner_key_id": owner, "mode": "exact",
            "released": {"rmse": 56.5}, "spent": 1, "state": {"budget_left": 4}, "withheld_until": None})),
        ("succeeded", lambda: submissions.transition(api.engine, sub_id, "succeeded", LIVE_STATES)),
        ("verdict", lambda: submissions.store_verdict(api.engine, sub_id, verdict, 0, None)),
        ("re-judged", lambda: submissions.store_verdict(api.engine, sub_id, {**verdict, "decision": "fail"}, 1,
                                                        None, judged_by="steward")),
    ]
    return steps


def test_every_change_gives_a_new_etag_and_a_304_never_hides_one(api: Api, submitted: dict[str, Any]) -> None:
    sub_id = submitted["id"]
    first = _read(api, sub_id)
    document, etag = first.get_json(), first.headers["ETag"]
    for step, change in _lifecycle(api, sub_id, submitted["dataset"]):
        change()
        polled = _read(api, sub_id, etag)
        current = _read(api, sub_id)
        # A full answer (perhaps the process's remembered one) is the document as built from the records now.
        built = submission_document(api.engine, submissions.get(api.engine, sub_id))  # type: ignore[arg-type]
        assert current.get_json() == built, step
        if current.get_json() == document:
            # Nothing the client can see changed: no body needs sending.
            assert polled.status_code == 304, step
            assert polled.get_data() == b"" and polled.headers["ETag"] == etag, step
            continue
        assert polled.status_code == 200, f"{step}: a 304 would hide a change"
        assert polled.get_json() == current.get_json(), step
        assert polled.headers["ETag"] == current.headers["ETag"] != etag, step
        document, etag = current.get_json(), current.headers["ETag"]
        # The answer without the document (one query) and the full answer agree on the new version.
        again = _read(api, sub_id, etag)
        assert again.status_code == 304 and again.headers["ETag"] == etag, step
    assert document["state"] == "succeeded" and document["result"]["verdict"]["decision"] == "fail"
    assert document["progress"]["folds_done"] == 5


def test_cancel_gives_a_new_etag(api: Api, submitted: dict[str, Any]) -> None:
    etag = _read(api, submitted["id"]).headers["ETag"]
    assert api.delete("submitter", f"/v1/submissions/{submitted['id']}").status_code == 200
    polled = _read(api, submitted["id"], etag)
    assert polled.status_code == 200 and polled.get_json()["state"] == "canceled"
    assert polled.headers["ETag"] != etag


@pytest.mark.parametrize("form", ["strong", "weak", "listed", "star"])
def test_if_none_match_uses_the_weak_comparison(api: Api, submitted: dict[str, Any], form: str) -> None:
    etag = _read(api, submitted["id"]).headers["ETag"]
    header = {"strong": etag, "weak": "W/" + etag, "listed": f'"other", {etag}', "star": "*"}[form]
    reply = _read(api, submitted["id"], header)
    assert reply.status_code == 304 and reply.get_data() == b"" and reply.headers["ETag"] == etag
    assert reply.headers["Cache-Control"] == "private, no-cache"


def test_a_stale_or_foreign_etag_gets_the_document(api: Api, submitted: dict[str, Any]) -> None:
    reply = _read(api, submitted["id"], '"0000"')
    assert reply.status_code == 200 and reply.get_json()["id"] == submitted["id"]


@pytest.mark.parametrize("who", ["other_submitter", "other_steward"])
def test_no_304_for_a_key_of_another_team(api: Api, submitted: dict[str, Any], who: str) -> None:
    etag = _read(api, submitted["id"]).headers["ETag"]
    for header in (etag, "*"):
        reply = api.get(who, f"/v1/submissions/{submitted['id']}", headers={"If-None-Match": header})
        # Exactly what an id that does not exist answers: the other team learns nothing, not even "unchanged".
        theirs = api.problem(reply, 404)
        unknown = api.problem(api.get(who, "/v1/submissions/sub_0000", headers={"If-None-Match": header}), 404)
        assert (theirs["type"], theirs["title"]) == (unknown["type"], unknown["title"])
        assert "ETag" not in reply.headers


def test_an_unknown_submission_with_if_none_match_is_404(api: Api) -> None:
    api.problem(api.get("submitter", "/v1/submissions/sub_0000", headers={"If-None-Match": "*"}), 404)


def test_the_remembered_documents_are_bounded_oldest_first() -> None:
    recent = RecentDocuments(max_entries=2)
    recent.put("sub_a", "1", "a1")
    recent.put("sub_b", "1", "b1")
    assert recent.get("sub_a", "1") == "a1"  # now the most recent
    recent.put("sub_c", "1", "c1")
    assert recent.get("sub_b", "1") is None and recent.get("sub_a", "1") == "a1" and recent.get("sub_c", "1") == "c1"
    assert recent.get("sub_a", "2") is None  # another version of a remembered submission is not it
