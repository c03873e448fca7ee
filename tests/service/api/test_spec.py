"""The committed OpenAPI document matches the code, and documents auth and problem responses."""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

import pytest
from openapi_spec_validator import OpenAPIV30SpecValidator

from service.api.spec_export import REGENERATE, SPEC_FILE, generate_spec
from tests.support.openapi import schema_violations

if TYPE_CHECKING:
    from tests.support.api import Api

OPEN_PATHS = {"/healthz", "/readyz", "/metrics"}


@pytest.fixture(scope="module")
def spec() -> dict[str, Any]:
    return generate_spec()


def _operations(spec: dict[str, Any]) -> list[tuple[str, str, dict[str, Any]]]:
    return [(path, method, op) for path, item in spec["paths"].items() for method, op in item.items()
            if method in ("get", "post", "put", "patch", "delete")]


def test_committed_spec_matches_the_code(spec: dict[str, Any]) -> None:
    assert SPEC_FILE.is_file(), f"{SPEC_FILE} is missing; generate it with `{REGENERATE}`"
    committed = json.loads(SPEC_FILE.read_text(encoding="utf-8"))
    if committed != spec:
        changed = sorted(set(committed.get("paths", {})) ^ set(spec["paths"])) or "schemas or operations"
        pytest.fail(f"openapi/openapi.json is out of date ({changed}); regenerate it with `{REGENERATE}` "
                    "and commit the result")


def test_every_route_of_the_surface_is_documented(spec: dict[str, Any]) -> None:
    documented = {(path, method) for path, method, _ in _operations(spec)}
    # The HTTP surface table of ARCHITECTURE.md, and the review gate's champion and report.
    for expected in [
        ("/v1/datasets", "post"), ("/v1/datasets", "get"), ("/v1/datasets/{ds_id}", "get"),
        ("/v1/datasets/{ds_id}/development", "get"), ("/v1/submissions", "post"), ("/v1/submissions", "get"),
        ("/v1/submissions/{sub_id}", "get"), ("/v1/submissions/{sub_id}", "delete"),
        ("/v1/submissions/{sub_id}/folds", "get"), ("/v1/catalog", "get"), ("/v1/keys", "post"),
        ("/v1/keys/{key_id}", "delete"), ("/healthz", "get"), ("/readyz", "get"), ("/metrics", "get"),
        ("/v1/datasets/{ds_id}/policy", "get"), ("/v1/datasets/{ds_id}/policy", "put"),
        ("/v1/datasets/{ds_id}/board", "get"), ("/v1/datasets/{ds_id}/champion", "post"),
        ("/v1/datasets/{ds_id}/champion", "get"), ("/v1/submissions/{sub_id}/report", "get"),
    ]:
        assert expected in documented, expected


def test_bearer_auth_is_required_except_on_operational_endpoints(spec: dict[str, Any]) -> None:
    assert spec["components"]["securitySchemes"]["bearer"] == {
        "type": "http", "scheme": "bearer", "description": "an API key: Authorization: Bearer <key>"}
    assert spec["security"] == [{"bearer": []}]
    for path, method, op in _operations(spec):
        if path in OPEN_PATHS:
            assert op.get("security") == [], (path, method)
        else:
            assert "security" not in op, (path, method)
            assert "401" in op["responses"], (path, method)


def test_errors_are_documented_as_problem_json(spec: dict[str, Any]) -> None:
    problem = spec["components"]["schemas"]["Problem"]
    assert set(problem["properties"]) == {"type", "title", "status", "detail", "errors"}
    for path, method, op in _operations(spec):
        for status, response in op["responses"].items():
            if status.isdigit() and int(status) >= 400:
                if "$ref" in response:
                    response = spec["components"]["responses"][response["$ref"].rsplit("/", 1)[1]]
                assert set(response["content"]) == {"application/problem+json"}, (path, method, status)


def test_dataset_registration_documents_both_bodies(spec: dict[str, Any]) -> None:
    content = spec["paths"]["/v1/datasets"]["post"]["requestBody"]["content"]
    assert set(content) == {"multipart/form-data", "application/json"}
    upload = spec["components"]["schemas"]["DatasetUpload"]
    assert upload["properties"]["file"] == {
        "type": "string", "format": "binary", "description": "CSV or Parquet, by file name or type"}


def test_committed_spec_is_valid_openapi_3_0() -> None:
    # openapi-spec-validator checks the document against the OpenAPI 3.0 specification's own schema
    # (there, exclusiveMinimum/exclusiveMaximum are booleans beside minimum/maximum).
    committed = json.loads(SPEC_FILE.read_text(encoding="utf-8"))
    errors = [f"{'/'.join(map(str, e.absolute_path))}: {e.message[:200]}"
              for e in OpenAPIV30SpecValidator(committed).iter_errors()]
    assert committed["openapi"].startswith("3.0.")
    assert errors == []


def test_catalog_answer_conforms_to_the_spec(api: Api) -> None:
    reply = api.get("submitter", "/v1/catalog")
    assert reply.status_code == 200
    catalog = reply.get_json()
    assert schema_violations("/v1/catalog", "get", 200, catalog) == []
    # scikit-learn deprecates some parameters; the catalog flags them, so the spec must allow the flag.
    flagged = [(e["name"], p) for e in catalog["estimators"] for p, spec in e["params"].items() if "deprecated" in spec]
    assert flagged, "the catalog should flag at least one deprecated scikit-learn parameter"


def test_policy_answers_conform_to_the_spec(api: Api, dataset: dict[str, Any]) -> None:
    path, template = f"/v1/datasets/{dataset['id']}/policy", "/v1/datasets/{ds_id}/policy"
    default = api.get("submitter", path).get_json()
    # rmse is in the target's units, so the default policy has no thresholdout parameters: null.
    assert default["release"]["thresholdout"] is None
    assert schema_violations(template, "get", 200, default) == []
    stored = api.call("steward", "PUT", path, json={
        "primary_metric": "r2", "baseline_alpha": 0.01, "release": {"mode": "thresholdout"}})
    assert stored.status_code == 200, stored.get_data(as_text=True)
    assert schema_violations(template, "put", 200, stored.get_json()) == []
    assert schema_violations(template, "get", 200, api.get("submitter", path).get_json()) == []
