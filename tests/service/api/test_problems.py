"""Every error is RFC 9457 problem+json; field problems are located by JSON pointers."""

from __future__ import annotations

import json
import sys
from typing import TYPE_CHECKING, Any

import pytest
from marshmallow import ValidationError
from redis import Redis
from sqlalchemy.exc import OperationalError

from service.api.bodies import MAX_JSON_DEPTH, nested_too_deep
from service.api.problems import ECHO_LIMIT, TEXT_LIMIT, cap_echoes, escape_pointer, flatten_messages
from service.api.submission_schemas import SubmissionRequestSchema
from service.errors import FieldProblem

if TYPE_CHECKING:
    from tests.support.api import Api

# Python's own recursion limit: a body nested deeper than this cannot even be decoded recursively.
BEYOND_THE_STACK = sys.getrecursionlimit() * 10



def test_nested_marshmallow_messages_become_json_pointers() -> None:
    with pytest.raises(ValidationError) as caught:
        SubmissionRequestSchema().load({
            "dataset": "ds_x",
            "model": {"estimator": "Ridge", "params": "alpha=1",
                      "preprocess": [{"transformer": "StandardScaler", "columns": ["a"]},
                                     {"transformer": 3, "columns": ["b"]}]},
            "validation": {"folds": "five"},
            "colour": "blue",
        })
    found = {p.pointer for p in flatten_messages(caught.value.messages)}
    assert found == {"/model/params", "/model/preprocess/1/transformer", "/validation/folds", "/colour"}


def test_pointer_segments_are_escaped_and_schema_errors_point_at_their_parent() -> None:
    # RFC 6901 section 3: "~" is written "~0" and "/" is written "~1".
    assert escape_pointer("a/b~c") == "a~1b~0c"
    messages = {"_schema": ["bad object"], "model": {"params": {"a/b": ["bad"]}}}
    assert list(flatten_messages(messages)) == [
        FieldProblem("", "bad object"), FieldProblem("/model/params/a~1b", "bad"),
    ]


def test_unknown_route_and_wrong_method_are_problems(api: Api) -> None:
    api.problem(api.get("submitter", "/v1/nothing-here"), 404)
    wrong = api.call("submitter", "PATCH", "/v1/catalog")
    problem = api.problem(wrong, 405)
    assert "GET" in wrong.headers["Allow"]
    assert problem["type"] == "about:blank"


def test_request_body_type_errors_carry_pointers(api: Api) -> None:
    reply = api.post("submitter", "/v1/submissions", json={
        "dataset": "ds_00", "model": {"estimator": "Ridge", "params": {"alpha": 1.0}, "features": "age"},
        "validation": {"folds": 2.5},
    })
    problem = api.problem(reply, 422)
    assert sorted(api.pointers(problem)) == ["/model/features", "/validation/folds"]
    assert problem["type"].endswith(":invalid-input")
    assert "/model/features" in problem["detail"]


def test_a_body_that_is_not_json_is_415_and_broken_json_is_400(api: Api) -> None:
    api.problem(api.post("submitter", "/v1/submissions", data="dataset=ds_1",
                            content_type="application/x-www-form-urlencoded"), 415)
    api.problem(api.post("submitter", "/v1/submissions", data="{not json",
                            content_type="application/json"), 400)


def test_unexpected_errors_leak_nothing(api: Api) -> None:
    @api.app.get("/boom")
    def boom() -> None:
        raise RuntimeError("secret detail /srv/sealed/ds_1/holdout.parquet")

    reply = api.get(None, "/boom")
    problem = api.problem(reply, 500)
    assert "secret" not in reply.get_data(as_text=True) and "holdout" not in reply.get_data(as_text=True)
    assert problem["title"] == "Internal error"


def test_records_db_and_queue_outages_are_503(api: Api) -> None:
    @api.app.get("/db-down")
    def db_down() -> None:
        raise OperationalError("SELECT secret FROM datasets", {}, Exception("unable to open database file"))

    @api.app.get("/redis-down")
    def redis_down() -> None:
        Redis.from_url("redis://127.0.0.1:1/0", socket_connect_timeout=0.5).ping()

    for path, words in (("/db-down", "records database"), ("/redis-down", "job queue")):
        reply = api.get(None, path)
        problem = api.problem(reply, 503)
        assert words in problem["detail"]
        assert "SELECT" not in reply.get_data(as_text=True) and "127.0.0.1" not in reply.get_data(as_text=True)


_HERE = "<nested>"


def _nested(depth: int) -> str:
    return "[" * depth + "1" + "]" * depth


@pytest.mark.parametrize("depth", [600, BEYOND_THE_STACK])
def test_deeply_nested_bodies_are_422_naming_the_limit(api: Api, dataset: dict[str, Any], depth: int) -> None:
    model = {"estimator": "Ridge", "params": {"alpha": _HERE}}
    bodies = [
        ("POST", "/v1/submissions", "submitter", {"dataset": dataset["id"], "model": model}),
        ("PUT", f"/v1/datasets/{dataset['id']}/policy", "steward", {"bar": _HERE}),
        ("POST", "/v1/datasets", "steward", {"path": _HERE}),
        ("POST", f"/v1/datasets/{dataset['id']}/champion", "steward", {"submission": _HERE}),
        ("POST", "/v1/keys", "admin", {"role": _HERE}),
    ]
    for method, path, who, shape in bodies:
        body = json.dumps(shape).replace(json.dumps(_HERE), _nested(depth))
        reply = api.call(who, method, path, data=body, content_type="application/json")
        problem = api.problem(reply, 422)
        assert f"at most {MAX_JSON_DEPTH} levels" in problem["detail"], (path, problem)
        pointer = api.pointers(problem)[0]
        # Where the decoder could read the body, the pointer names the field that nests too deep.
        assert pointer == "" if depth == BEYOND_THE_STACK else pointer.split("/")[1] in shape, (path, pointer)
        assert len(reply.get_data()) < 2000


def test_nesting_is_measured_without_recursion() -> None:
    # The depth of a JSON text is the number of nested arrays and objects (RFC 8259 section 9 lets a
    # parser bound it); the top level is depth 1.
    assert nested_too_deep(json.loads(_nested(3)), 3) is None
    assert nested_too_deep(json.loads(_nested(4)), 3) == "/0/0/0"
    assert nested_too_deep({"a": {"b~/c": [1, {}]}}, 3) == "/a/b~0~1c/1"
    deep: list[Any] = []
    for _ in range(BEYOND_THE_STACK):
        deep = [deep]
    assert nested_too_deep(deep, MAX_JSON_DEPTH) == "/0" * MAX_JSON_DEPTH


def test_a_huge_value_comes_back_capped(api: Api, dataset: dict[str, Any]) -> None:
    huge = "x" * 200_000  # twice in the body, under the test app's 512 KiB limit
    reply = api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json={"bar": huge, huge: 1})
    problem = api.problem(reply, 422)
    assert len(reply.get_data()) < 3 * 1024
    assert f"'{'x' * (ECHO_LIMIT - 1)}…' (200000 characters)" in problem["detail"]
    assert sorted(api.pointers(problem)) == ["/bar", f"/{'x' * (ECHO_LIMIT - 1)}… (200001 characters)"]
    path = api.get("submitter", "/v1/submissions", query_string={"dataset": huge})
    assert len(path.get_data()) < 1024 and "(200000 characters)" in api.problem(path, 404)["detail"]


def test_echoes_are_capped_and_the_rest_of_the_text_kept() -> None:
    assert cap_echoes("got 'short' and 12") == "got 'short' and 12"
    long = "a b" * 50  # 150 characters with spaces: one quoted value
    assert cap_echoes(f"name {long!r} is taken; it's yours") == (
        f"name '{long[:ECHO_LIMIT - 1]}…' (150 characters) is taken; it's yours")
    assert cap_echoes("id " + "7" * 300 + " unknown") == f"id {'7' * ECHO_LIMIT}… (300 characters) unknown"
    many = repr(["x"] * 100_000)
    capped = cap_echoes(f"got {many}")
    assert len(capped) < TEXT_LIMIT + 200 and capped.endswith(f"… ({len(many) + 4} characters)")
    ordinary = "estimator 'X' is not in the catalog; use one of: " + ", ".join(["HistGradientBoostingRegressor"] * 20)
    assert cap_echoes(ordinary) == ordinary
