"""The README's request bodies run against a live stack as written: configurations, policy, champion, re-judge, keys.

The bodies are read from README.md (each fenced ``json`` block after an ``<!-- example: NAME -->`` line),
so an example that stops working fails here. They are written for the invented demo dataset, which is
registered here as ``sealfold up`` registers it; the checks are that each documented option does what
the README says of it, not reference values.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest

from service.cli import demo
from tests.support.stack import Stack

README = Path(__file__).resolve().parents[2] / "README.md"
_EXAMPLE = re.compile(r"<!-- example: (\S+) -->\n```json\n(.*?)\n```", re.DOTALL)


def examples() -> dict[str, str]:
    return dict(_EXAMPLE.findall(README.read_text(encoding="utf-8")))


def body(name: str, **ids: str) -> Any:
    text = examples()[name]
    for placeholder, value in ids.items():
        text = text.replace(f'"{placeholder}"', json.dumps(value))
    return json.loads(text)


@pytest.fixture(scope="module")
def demo_dataset(stack: Stack, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    path = demo.write_demo_csv(tmp_path_factory.mktemp("demo"))
    fields = {**demo.demo_declaration(), "name": "readme-demo"}
    reply = stack.client("steward").upload("/v1/datasets", path.name, path.read_bytes(), fields)
    assert reply.status == 201, reply.text
    return dict(reply.json())


def test_every_example_is_valid_json() -> None:
    found = examples()
    assert {"nested-search", "learning-curve", "repeats", "5x2cv", "policy", "champion", "rejudge-dataset",
            "register-by-path", "key"} <= set(found)
    for name in found:
        body(name, DS="ds_x", SUB="sub_x")


def test_the_configuration_examples_run_as_documented(stack: Stack, demo_dataset: dict[str, Any]) -> None:
    ds = demo_dataset["id"]
    done: dict[str, dict[str, Any]] = {}
    for name in ("nested-search", "learning-curve", "repeats", "5x2cv"):
        reply = stack.client().post("/v1/submissions", json_body=body(name, DS=ds))
        assert reply.status == 202, f"{name}: {reply.text}"
        done[name] = stack.wait_for(reply.json()["id"], timeout=240)
        assert done[name]["state"] == "succeeded", (name, done[name].get("error"))
        assert done[name]["result"]["verdict"] is not None

    search = done["nested-search"]["result"]["search"]
    assert search is not None and "alpha" in json.dumps(search)
    assert all(f["search"]["best_params"]["alpha"] in (0.1, 1.0, 10.0)
               for f in done["nested-search"]["result"]["cv"]["folds"])
    curve = done["learning-curve"]["result"]["learning_curve"]
    assert curve is not None and len(curve) == 3
    assert done["repeats"]["progress"]["folds_total"] == 15
    assert {f["repeat"] for f in done["repeats"]["result"]["cv"]["folds"]} == {0, 1, 2}
    assert done["5x2cv"]["progress"]["folds_total"] == 10
    assert done["5x2cv"]["result"]["verdict"]["test"] == "five_by_two_cv"


def test_the_steward_examples_run_as_documented(stack: Stack, demo_dataset: dict[str, Any]) -> None:
    steward, ds = stack.client("steward"), demo_dataset["id"]
    imports = Path(stack.settings.import_root)
    demo.write_demo_csv(imports).rename(imports / "routes.csv")
    registered = steward.post("/v1/datasets", json_body=body("register-by-path"))
    assert registered.status == 201, registered.text
    assert {c["name"]: c["missing"] for c in registered.json()["columns"]}["route_id"] == 0

    submitted = stack.client().post("/v1/submissions", json_body={
        "dataset": ds, "label": "ridge for the steward examples",
        "model": {"estimator": "Ridge", "features": ["distance_km", "stops", "payload_kg"]}})
    assert submitted.status in (200, 202), submitted.text
    sub = stack.wait_for(submitted.json()["id"])
    policy = steward.request("PUT", f"/v1/datasets/{ds}/policy", json_body=body("policy"))
    assert policy.status == 200, policy.text
    version = policy.json()["version"]
    assert policy.json()["bar"] == 9.0 and policy.json()["champion_margin"] == 0.1

    rejudged = steward.post(f"/v1/datasets/{ds}/verdicts", json_body=body("rejudge-dataset"))
    assert rejudged.status == 200, rejudged.text
    assert sub["id"] in {r["submission"] for r in rejudged.json()["results"]}
    after = stack.client().get(f"/v1/submissions/{sub['id']}").json()["result"]["verdict"]
    assert after["policy_version"] == version

    promoted = steward.post(f"/v1/datasets/{ds}/champion", json_body=body("champion", SUB=sub["id"]))
    assert promoted.status == (200 if after["decision"] == "pass" else 409), promoted.text

    key = stack.client("admin").post("/v1/keys", json_body=body("key"))
    assert key.status == 201 and key.json()["role"] == "submitter" and key.json()["name"] == "ci runner"
    assert stack.client(key.json()["token"]).get("/v1/datasets").status == 200
