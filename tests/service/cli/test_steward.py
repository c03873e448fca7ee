"""Every role's client commands against the real API over HTTP: register, policy, re-judge, champion, keys, report.

The app is the real one (waitress on a free port, SQLite records, a real redis-server for the release
lock); the commands run in this process through ``service.cli.main.main`` so their exit code, stdout and
stderr are checked directly. Finished submissions are written into the records as the worker chain
leaves them (tests.support.reviews); data: scikit-learn's diabetes table.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest
from redis import Redis

from service.cli import access, main
from service.records import keys as key_records
from service.records import submissions
from service.vocabulary import LIVE_STATES
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.reviews import RAW_HOLDOUT, make_submission
from tests.support.servers import ServedApp

if TYPE_CHECKING:
    from tests.support.api import Api


@pytest.fixture
def served(api: Api, redis_url: str) -> Iterator[str]:
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(ctx, redis=Redis.from_url(redis_url))
    with ServedApp(api.app) as live:
        yield live.url


class Cli:
    """Run ``sealfold`` commands in this process as one of the test keys; return (exit code, stdout, stderr)."""

    def __init__(self, api: Api, url: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch):
        self.api, self.url, self.capsys = api, url, capsys
        monkeypatch.setenv("SEALFOLD_URL", url)

    def __call__(self, who: str, *argv: str) -> tuple[int, str, str]:
        self.capsys.readouterr()
        code = main.main([*argv, "--key", self.api.tokens.get(who, who)])
        out, err = self.capsys.readouterr()
        return code, out, err


@pytest.fixture
def cli(api: Api, served: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> Cli:
    return Cli(api, served, capsys, monkeypatch)


def test_register_by_upload_and_by_path_lists_missing_values(cli: Cli, api: Api, tmp_path: Path) -> None:
    frame = diabetes_frame()
    frame.loc[frame.index % 5 == 0, "bp"] = None  # holes in one column
    path = tmp_path / "clinic.csv"
    path.write_bytes(csv_bytes(frame))
    code, out, err = cli("steward", "register", str(path), "--name", "clinic", "--task", "regression",
                         "--target", "target", "--folds", "4")
    assert code == 0, err
    ds_id = out.split()[0]
    record = api.get("steward", f"/v1/datasets/{ds_id}").get_json()
    assert record["fold_plan"]["folds"] == 4
    bp = next(c for c in record["columns"] if c["name"] == "bp")
    assert bp["missing"] > 0
    assert any(line.split()[:3] == ["bp", "numeric", str(bp["missing"])] for line in out.splitlines()), out

    code, _, err = cli("steward", "register", str(path), "--name", "clinic", "--task", "regression",
                       "--target", "target")
    assert code == 2 and "/name" in err and "already has a dataset named 'clinic'" in err
    code, _, err = cli("submitter", "register", str(path), "--name", "other", "--task", "regression",
                       "--target", "target")
    assert code == 2 and "403" in err

    (Path(api.settings.import_root) / "clinic.csv").write_bytes(csv_bytes(diabetes_frame()))
    code, out, err = cli("steward", "register", "clinic.csv", "--import", "--name", "clinic by path",
                         "--task", "regression", "--target", "target", "--json")
    assert code == 0, err
    assert json.loads(out)["rows"]["total"] == 442
    code, _, err = cli("steward", "register", "../etc/passwd", "--import", "--name", "escape", "--task",
                       "regression", "--target", "target")
    assert code == 2 and "/path" in err


def test_policy_show_set_and_its_field_messages(cli: Cli, api: Api, dataset: dict[str, Any], tmp_path: Path) -> None:
    code, out, _ = cli("submitter", "policy", dataset["id"])
    assert code == 0 and "policy version 0" in out and "primary metric   rmse (lower is better)" in out
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"champion_margin": -1, "release": {"mode": "peek"}}))
    code, _, err = cli("steward", "policy", dataset["id"], "--set", str(bad))
    assert code == 2 and "422" in err
    assert "  /champion_margin: " in err and "  /release/mode: " in err  # one line per field, as the API says
    good = tmp_path / "policy.json"
    good.write_text(json.dumps({"bar": 60.0, "champion_margin": 1.5}))
    code, _, err = cli("submitter", "policy", dataset["id"], "--set", str(good))
    assert code == 2 and "403" in err
    code, out, err = cli("steward", "policy", dataset["id"], "--set", str(good), "--json")
    assert code == 0, err
    assert json.loads(out)["version"] == 1 and json.loads(out)["bar"] == 60.0
    not_json = tmp_path / "not.json"
    not_json.write_text("bar: 60")
    assert cli("steward", "policy", dataset["id"], "--set", str(not_json))[0] == 2


def test_rejudge_one_and_a_dataset_and_the_board_marks_older_policies(
    cli: Cli, api: Api, dataset: dict[str, Any]
) -> None:
    owner = api.key_ids["submitter"]
    subs = [make_submission(api.engine, dataset, owner, label=f"m{i}", scores=[55 + i, 56 + i, 54 + i, 57 + i, 53 + i])
            for i in range(3)]
    api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json={"bar": 56.5})
    code, out, _ = cli("submitter", "board", dataset["id"])
    assert code == 0 and "pass v0 !" in out and f"sealfold rejudge --dataset {dataset['id']}" in out

    code, out, err = cli("steward", "rejudge", subs[0])  # CV mean 55 meets the bar of 56.5: exit 0 unless a rule fails
    decision = api.get("steward", f"/v1/submissions/{subs[0]}").get_json()["result"]["verdict"]["decision"]
    assert code == (0 if decision == "pass" else 1), err
    assert f"{subs[0]}: pass (policy v0) -> {decision} (policy v1)" in out
    assert str(RAW_HOLDOUT) not in out
    assert cli("submitter", "rejudge", subs[1])[0] == 2

    code, out, err = cli("steward", "rejudge", "--dataset", dataset["id"])
    assert code == 0, err
    assert "2 of 2 submissions re-judged under policy version 1" in out
    code, out, _ = cli("submitter", "board", dataset["id"])
    assert "v0" not in out and "!" not in out
    history = api.get("submitter", f"/v1/submissions/{subs[2]}/verdicts").get_json()["history"]
    assert [h["policy_version"] for h in history] == [0, 1] and history[1]["verdict"]["decision"] == "fail"


def test_champion_show_and_promote(cli: Cli, api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    good = make_submission(api.engine, dataset, owner, label="good", scores=[50, 51, 49, 52, 48])
    bad = make_submission(api.engine, dataset, owner, label="bad", scores=[60, 61, 59, 62, 58], decision="fail")
    code, out, _ = cli("submitter", "champion", dataset["id"])
    assert code == 0 and "no champion" in out
    code, _, err = cli("steward", "champion", dataset["id"], "--promote", bad)
    assert code == 2 and "409" in err and "'fail'" in err
    assert cli("submitter", "champion", dataset["id"], "--promote", good)[0] == 2
    code, out, err = cli("steward", "champion", dataset["id"], "--promote", good)
    assert code == 0 and f"champion of {dataset['id']}: {good}  good" in out, err


def test_keys_issue_and_revoke_through_the_api(cli: Cli, api: Api, dataset: dict[str, Any]) -> None:
    code, out, err = cli("admin", "keys", "issue", "--role", "submitter", "--name", "ci runner")
    assert code == 0, err
    token = out.strip()
    assert token.startswith("sf_") and len(out.splitlines()) == 1  # only the token on stdout, for scripts
    key_id = err.split("key ")[1].split()[0]
    assert cli(token, "datasets")[0] == 0
    assert cli("steward", "keys", "issue", "--role", "submitter")[0] == 2  # an admin's action
    code, out, err = cli("admin", "keys", "revoke", key_id)
    assert code == 0 and key_id in out, err
    assert key_records.get_key(api.engine, key_id) is not None  # kept in the records, refused from now on
    code, _, err = cli(token, "datasets")
    assert code == 2 and "401" in err


def test_report_prints_the_url_and_opens_it(
    cli: Cli, api: Api, dataset: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    sub = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=[50, 51, 49, 52, 48])
    opened: list[str] = []
    monkeypatch.setattr(access.webbrowser, "open", lambda url: opened.append(url) or True)
    code, out, _ = cli("submitter", "report", sub)
    assert code == 0 and out.strip() == f"{cli.url}/v1/submissions/{sub}/report" and opened == []
    code, out, _ = cli("submitter", "report", sub, "--open")
    assert code == 0 and opened == [out.strip()]
    assert cli("submitter", "report", "sub_nope", "--open")[0] == 2 and len(opened) == 1
    monkeypatch.setattr(access.webbrowser, "open", lambda url: False)
    code, _, err = cli("submitter", "report", sub, "--open")
    assert code == 3 and "open http" in err


def test_status_of_a_failed_submission_exits_1_and_says_why(cli: Cli, api: Api, dataset: dict[str, Any]) -> None:
    sub = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=None, decision=None)
    submissions.transition(api.engine, sub, "failed", LIVE_STATES,
                           error="fold 2 of repeat 0 was lost to a worker crash twice")
    code, out, err = cli("submitter", "status", sub)
    assert code == 1 and "state failed" in out
    assert f"{sub} failed: fold 2 of repeat 0 was lost to a worker crash twice" in err
    canceled = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=None, decision=None)
    submissions.transition(api.engine, canceled, "canceled", LIVE_STATES)
    assert cli("submitter", "status", canceled)[0] == 1
    done = make_submission(api.engine, dataset, api.key_ids["submitter"], scores=[50, 51, 49, 52, 48])
    assert cli("submitter", "status", done)[0] == 0
