"""Bearer keys: 401 without a valid one, 403 below the needed role, and keys administered by admins."""

from __future__ import annotations

from typing import TYPE_CHECKING

import pytest

from service.records import audit

if TYPE_CHECKING:
    from tests.support.api import Api


CHALLENGE = 'Bearer realm="sealfold"'


@pytest.mark.parametrize("header", [None, "", "Basic dXNlcjpwYXNz", "Bearer", "Bearer    "])
def test_missing_or_malformed_credentials_are_401_with_a_challenge(api: Api, header: str | None) -> None:
    headers = {} if header is None else {"Authorization": header}
    reply = api.get(None, "/v1/catalog", headers=headers)
    api.problem(reply, 401)
    assert reply.headers["WWW-Authenticate"].startswith(CHALLENGE)


def test_an_unknown_token_is_401_invalid_token(api: Api) -> None:
    reply = api.get("sf_not-a-real-token", "/v1/catalog")
    api.problem(reply, 401)
    # RFC 6750 section 3.1: error="invalid_token" for a token that is expired, revoked or malformed.
    assert reply.headers["WWW-Authenticate"] == CHALLENGE + ', error="invalid_token"'


@pytest.mark.parametrize(("who", "method", "path"), [
    ("submitter", "POST", "/v1/datasets"),
    ("submitter", "POST", "/v1/keys"),
    ("steward", "POST", "/v1/keys"),
    ("steward", "DELETE", "/v1/keys/key_0000"),
])
def test_a_weaker_role_is_403(api: Api, who: str, method: str, path: str) -> None:
    problem = api.problem(api.call(who, method, path, json={"role": "admin"}), 403)
    assert "submitter" in problem["detail"] or "steward" in problem["detail"]


def test_authentication_runs_before_the_body_is_parsed(api: Api) -> None:
    # Without a key, a broken body must not tell the caller anything about validation.
    api.problem(api.post(None, "/v1/submissions", json={"nonsense": True}), 401)
    api.problem(api.post("submitter", "/v1/keys", json={"role": "overlord"}), 403)


def test_admin_creates_a_key_whose_token_works_once_shown(api: Api) -> None:
    reply = api.post("admin", "/v1/keys", json={"role": "steward", "name": "ci"})
    assert reply.status_code == 201, reply.get_data(as_text=True)
    created = reply.get_json()
    assert created["team"] == "fleet" and created["role"] == "steward" and created["token"]
    assert reply.headers["Location"] == f"/v1/keys/{created['id']}"
    assert reply.headers["Cache-Control"] == "no-store"
    assert api.get(created["token"], "/v1/datasets").status_code == 200
    assert [e["action"] for e in audit.events_for(api.engine, created["id"])] == ["key.created"]


def test_revoked_key_is_refused(api: Api) -> None:
    created = api.post("admin", "/v1/keys", json={"role": "submitter"}).get_json()
    assert api.delete("admin", f"/v1/keys/{created['id']}").status_code == 204
    api.problem(api.get(created["token"], "/v1/catalog"), 401)
    # Revoking twice is not an error.
    assert api.delete("admin", f"/v1/keys/{created['id']}").status_code == 204


def test_admin_cannot_touch_another_teams_keys(api: Api) -> None:
    api.problem(api.post("admin", "/v1/keys", json={"team": "rivals", "role": "admin"}), 403)
    rival_key = api.key_ids["other_submitter"]
    unknown = api.problem(api.delete("admin", "/v1/keys/key_doesnotexist"), 404)
    other = api.problem(api.delete("admin", f"/v1/keys/{rival_key}"), 404)
    # Another team's key looks exactly like a key that does not exist.
    assert other["title"] == unknown["title"] and other["type"] == unknown["type"]
    assert api.get("other_submitter", "/v1/catalog").status_code == 200


def test_key_creation_validates_with_pointers(api: Api) -> None:
    problem = api.problem(api.post("admin", "/v1/keys", json={"role": "root", "extra": 1}), 422)
    assert sorted(api.pointers(problem)) == ["/extra", "/role"]


def test_a_key_records_whose_it_is_and_a_bad_identity_is_named(api: Api) -> None:
    made = api.post("admin", "/v1/keys", json={"role": "submitter", "identity": "ci-nightly"}).get_json()
    again = api.post("admin", "/v1/keys", json={"role": "submitter", "identity": "ci-nightly"}).get_json()
    assert made["identity"] == again["identity"] == "ci-nightly" and made["id"] != again["id"]
    assert api.post("admin", "/v1/keys", json={"role": "submitter"}).get_json()["identity"] is None
    problem = api.problem(api.post("admin", "/v1/keys", json={"role": "submitter", "identity": "key_x"}), 422)
    assert api.pointers(problem) == ["/identity"] and "identity must be" in problem["detail"]
