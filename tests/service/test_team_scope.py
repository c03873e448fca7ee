"""Team scoping: a key reaches its own team's datasets, submissions and keys; another team's look absent."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest

from service import team_scope
from service.errors import NotFound
from service.records import keys
from service.records.keys import KeyInfo
from tests.support.api import Api
from tests.support.reviews import make_submission


def _key(api: Api, who: str) -> KeyInfo:
    info = keys.get_key(api.engine, api.key_ids[who])
    assert info is not None
    return info


def test_a_key_reaches_its_own_teams_records(api: Api, dataset: dict[str, Any]) -> None:
    mine = _key(api, "submitter")
    sub_id = make_submission(api.engine, dataset, mine.id, scores=None)
    row = team_scope.team_dataset(api.engine, mine, dataset["id"])
    assert row["id"] == dataset["id"] and "sealing_seed" in row  # the whole row, for the core
    assert team_scope.team_submission(api.engine, mine, sub_id)["id"] == sub_id
    assert team_scope.team_key(api.engine, mine, api.key_ids["steward"]).id == api.key_ids["steward"]


@pytest.mark.parametrize("resource", ["dataset", "submission", "key"])
def test_another_teams_record_is_as_absent_as_an_unknown_id(api: Api, dataset: dict[str, Any], resource: str) -> None:
    sub_id = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=None)
    lookups: dict[str, tuple[Callable[..., Any], str]] = {
        "dataset": (team_scope.team_dataset, dataset["id"]),
        "submission": (team_scope.team_submission, sub_id),
        "key": (team_scope.team_key, api.key_ids["submitter"]),
    }
    lookup, real = lookups[resource]
    rival = _key(api, "other_steward")
    with pytest.raises(NotFound) as other:
        lookup(api.engine, rival, real)
    with pytest.raises(NotFound) as unknown:
        lookup(api.engine, rival, "nothing_by_this_id")
    assert other.value.detail == unknown.value.detail.replace("nothing_by_this_id", real)
    assert "rivals" in other.value.detail and "fleet" not in other.value.detail


def test_a_pointer_names_the_request_field_the_id_came_from(api: Api, dataset: dict[str, Any]) -> None:
    rival = _key(api, "other_submitter")
    with pytest.raises(NotFound) as caught:
        team_scope.team_dataset(api.engine, rival, dataset["id"], pointer="/dataset")
    assert [p.pointer for p in caught.value.problems] == ["/dataset"]
    with pytest.raises(NotFound) as plain:
        team_scope.team_submission(api.engine, rival, "sub_unknown")
    assert plain.value.problems == []
