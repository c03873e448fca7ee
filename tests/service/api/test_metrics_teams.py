"""/metrics says nothing per team: no team, key, dataset or submission in a label, only route templates.

Two teams register data and submit; the exposition is read without a key (as Prometheus does) and
every label must come from the fixed vocabulary (state, method, route template, status).
"""

from __future__ import annotations

import re
from typing import Any

from tests.support.api import Api, submission_body

LABEL = re.compile(r'([a-z_]+)="([^"]*)"')


def test_metrics_carry_no_team_key_dataset_or_submission(
    api: Api, dataset: dict[str, Any], diabetes_csv: bytes, worker_says_ok: list[dict[str, Any]],
) -> None:
    rivals = api.upload("other_steward", diabetes_csv, name="rival data", target="target", task="regression")
    assert rivals.status_code == 201
    mine = api.post("submitter", "/v1/submissions", json=submission_body(dataset)).get_json()
    theirs = api.post("other_submitter", "/v1/submissions", json=submission_body(rivals.get_json())).get_json()
    for sub in (mine, theirs):
        api.get("submitter", f"/v1/submissions/{sub['id']}")  # 200 for one, 404 for the other
    text = api.get(None, "/metrics").get_data(as_text=True)
    secrets = [mine["id"], theirs["id"], dataset["id"], rivals.get_json()["id"], "fleet", "rivals",
               *api.key_ids.values()]
    assert not [s for s in secrets if s in text]
    labels = {name for line in text.splitlines() if not line.startswith("#") for name, _ in LABEL.findall(line)}
    # Labels name states, routes, queues (a deployment setting), job kinds and outcomes, histogram bounds and
    # scrape sources: nothing that tells one team from another.
    assert labels <= {"state", "method", "route", "status", "queue", "kind", "outcome", "le", "source"}
    routes = {value for line in text.splitlines() for name, value in LABEL.findall(line) if name == "route"}
    assert any("<" in r for r in routes)  # a path with an id is counted under its template
    assert all(not re.search(r"(sub|ds|key)_[0-9a-f]{20}", r) for r in routes)


def test_without_a_token_metrics_answer_only_callers_on_this_host(api: Api) -> None:
    # The figures are sums over every team; from another host they would let a team subtract its own counts.
    assert api.client.get("/metrics", environ_base={"REMOTE_ADDR": "127.0.0.1"}).status_code == 200
    assert api.client.get("/metrics", environ_base={"REMOTE_ADDR": "::1"}).status_code == 200
    for remote in ("10.1.2.3", "192.0.2.7", "2001:db8::1"):
        reply = api.client.get("/metrics", environ_base={"REMOTE_ADDR": remote})
        assert reply.status_code == 403
        assert reply.content_type == "application/problem+json"
        assert "SEALFOLD_METRICS_TOKEN" in reply.get_json()["detail"]
