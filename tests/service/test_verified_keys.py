"""The API's memory of verified keys: a revoked key stops working within ``key_cache_seconds``, never later.

A revoked token must be refused (RFC 6750 section 3.1, error="invalid_token"); the memory only bounds
how soon another process's revocation is seen, and the bound is checked here on a hand-moved clock.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import pytest
from sqlalchemy import Engine

from service.errors import SettingsError
from service.records import keys
from service.settings import Settings
from service.verified_keys import VerifiedKeys

if TYPE_CHECKING:
    from tests.support.api import Api


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def test_a_key_revoked_elsewhere_stops_working_within_the_ttl(records: Engine) -> None:
    clock = Clock()
    memory = VerifiedKeys(ttl=2.0, clock=clock)
    info, token = keys.create_key(records, "fleet", "submitter", "ci")
    assert memory.authenticate(records, token) == info
    keys.revoke(records, info.id)  # as another API process or the command line would
    clock.now += 1.9
    assert memory.authenticate(records, token) == info  # still remembered: within the documented bound
    clock.now += 0.2
    assert memory.authenticate(records, token) is None  # past it: read again, and refused


def test_forget_refuses_at_once(records: Engine) -> None:
    memory = VerifiedKeys(ttl=60.0, clock=Clock())
    info, token = keys.create_key(records, "fleet", "submitter", "ci")
    assert memory.authenticate(records, token) == info
    keys.revoke(records, info.id)
    memory.forget(info.id)
    assert memory.authenticate(records, token) is None


def test_ttl_zero_reads_the_records_every_time(records: Engine) -> None:
    memory = VerifiedKeys(ttl=0.0, clock=Clock())
    info, token = keys.create_key(records, "fleet", "submitter", "ci")
    assert memory.authenticate(records, token) == info
    keys.revoke(records, info.id)
    assert memory.authenticate(records, token) is None


def test_an_unknown_token_is_looked_up_every_time(records: Engine, monkeypatch: pytest.MonkeyPatch) -> None:
    memory = VerifiedKeys(ttl=60.0, clock=Clock())
    lookups: list[str] = []
    real = keys.authenticate

    def counting(engine: Engine, token: str) -> keys.KeyInfo | None:
        lookups.append(token)
        return real(engine, token)

    monkeypatch.setattr(keys, "authenticate", counting)
    assert memory.authenticate(records, "sf_not-a-key") is None
    assert memory.authenticate(records, "sf_not-a-key") is None
    assert len(lookups) == 2
    info, token = keys.create_key(records, "fleet", "submitter", "ci")
    for _ in range(3):
        assert memory.authenticate(records, token) == info
    assert len(lookups) == 3  # a live key: once per ttl


def test_the_api_refuses_a_key_revoked_in_the_records_once_the_ttl_passed(api: Api) -> None:
    import dataclasses

    clock = Clock()
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, verified_keys=VerifiedKeys(ttl=2.0, clock=clock))
    created = api.post("admin", "/v1/keys", json={"role": "submitter"}).get_json()
    assert api.get(created["token"], "/v1/catalog").status_code == 200
    keys.revoke(api.engine, created["id"])  # not through this process
    clock.now += 2.1
    reply = api.get(created["token"], "/v1/catalog")
    api.problem(reply, 401)
    assert reply.headers["WWW-Authenticate"].endswith('error="invalid_token"')


def test_the_api_refuses_a_key_revoked_through_it_at_once(api: Api) -> None:
    import dataclasses

    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, verified_keys=VerifiedKeys(ttl=60.0, clock=Clock()))
    created = api.post("admin", "/v1/keys", json={"role": "submitter"}).get_json()
    assert api.get(created["token"], "/v1/catalog").status_code == 200
    assert api.delete("admin", f"/v1/keys/{created['id']}").status_code == 204
    api.problem(api.get(created["token"], "/v1/catalog"), 401)


def test_the_ttl_is_a_bounded_setting() -> None:
    assert Settings.load(environ={"SEALFOLD_KEY_CACHE_SECONDS": "0.5"}).key_cache_seconds == 0.5
    assert Settings.load(environ={}).key_cache_seconds == 2.0
    with pytest.raises(SettingsError, match="key_cache_seconds must be between 0 and 60, got 61"):
        Settings.load(environ={"SEALFOLD_KEY_CACHE_SECONDS": "61"})
