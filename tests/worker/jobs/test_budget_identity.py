"""Holdout budgets belong to identities and teams, not keys: minting keys creates no budget."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from redis import Redis
from sklearn.linear_model import Ridge
from sqlalchemy import update

from service.errors import InputError
from service.records import holdout_releases, keys, policies
from service.records.tables import submissions as submissions_table
from tests.worker.jobs.test_verdict import diabetes, recorded  # noqa: F401  (fixture re-used)
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict


@pytest.fixture
def redis(redis_url: str) -> Iterator[Redis]:
    client = Redis.from_url(redis_url)
    yield client
    client.close()


def _judged_by(ctx: WorkerContext, redis: Redis, dataset: dict[str, Any], key: keys.KeyInfo,
               alpha: float) -> dict[str, Any]:
    """Record a submission owned by ``key``, judge it, and return its release row."""
    judged = recorded(ctx, dataset, Ridge(alpha=alpha))
    with ctx.engine.begin() as conn:
        conn.execute(update(submissions_table).where(submissions_table.c.id == judged.sub_id)
                     .values(owner_key_id=key.id))
    give_verdict(ctx, redis, judged.sub_id)
    row = holdout_releases.get(ctx.engine, judged.sub_id)
    assert row is not None
    return row


def test_keys_of_one_identity_share_its_budget_and_the_team_is_bounded(
    ctx: WorkerContext, redis: Redis, diabetes: dict[str, Any]  # noqa: F811
) -> None:
    policies.put(ctx.engine, diabetes["id"], {"release": {"mode": "exact", "budget": 1, "team_budget": 3}},
                 "key_steward")
    alice_laptop, _ = keys.create_key(ctx.engine, "fleet", "submitter", "laptop", identity="alice@fleet.example")
    alice_ci, _ = keys.create_key(ctx.engine, "fleet", "submitter", "second key", identity="alice@fleet.example")
    bob, _ = keys.create_key(ctx.engine, "fleet", "submitter", "bob")  # no identity: the key is its own
    carol, _ = keys.create_key(ctx.engine, "fleet", "submitter", "", identity="ci-nightly")
    dan, _ = keys.create_key(ctx.engine, "fleet", "submitter", "", identity="dan@fleet.example")
    assert (alice_laptop.budget_identity, bob.budget_identity) == ("alice@fleet.example", bob.id)

    first = _judged_by(ctx, redis, diabetes, alice_laptop, 0.1)
    assert (first["outcome"], first["spent"], first["identity"]) == ("released", 1, "alice@fleet.example")
    # A second key minted for the same person finds the person's budget spent.
    second = _judged_by(ctx, redis, diabetes, alice_ci, 0.2)
    assert (second["outcome"], second["spent"], second["released"]) == ("withheld", 0, None)
    # Other identities have budgets of their own, up to the team's 3 per window ...
    assert _judged_by(ctx, redis, diabetes, bob, 0.3)["outcome"] == "released"
    assert _judged_by(ctx, redis, diabetes, carol, 0.4)["outcome"] == "released"
    # ... and then the team's bound withholds even an identity that spent nothing.
    last = _judged_by(ctx, redis, diabetes, dan, 0.5)
    assert (last["outcome"], last["spent"]) == ("withheld", 0)
    assert last["withheld_until"] is not None


def test_an_identity_is_checked_when_a_key_is_minted(ctx: WorkerContext) -> None:
    for bad in ("", "key_0123456789abcdef0123", "has space", "x" * 101, "-leading-dash"):
        with pytest.raises(InputError, match="identity must be"):
            keys.create_key(ctx.engine, "fleet", "submitter", "", identity=bad)
    info, _ = keys.create_key(ctx.engine, "fleet", "submitter", "", identity="ci:deliveries-nightly")
    assert keys.get_key(ctx.engine, info.id) == info
