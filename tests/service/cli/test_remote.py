"""The ``sealfold`` client commands: exit codes, --json, progress on stderr, idempotent reruns.

Two servers: a scripted stub (standard-library HTTP on a free port) that plays a submission's life
exactly as told -- including 304s, 5xx and problems -- and the real app served by waitress, to
check the client and the API agree. Real processes are used where the process matters: the exit
code, the environment, and stderr being a pipe or a terminal.
"""

from __future__ import annotations

import hashlib
import json
import os
import pty
import subprocess
import sys
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from service.cli import main, remote
from tests.support.reviews import RAW_HOLDOUT, make_submission
from tests.support.servers import ServedApp, free_port

if TYPE_CHECKING:
    from tests.support.api import Api


SUB = "sub_0123456789abcdef0123"
CONFIG = {"dataset": "ds_0123456789abcdef0123", "model": {"estimator": "Ridge", "params": {"alpha": 1.0}},
          "metrics": ["rmse"], "label": "ridge for CI"}


def document(state: str, done: int, decision: str | None = None, total: int = 5) -> dict[str, Any]:
    """A submission document as the service answers it (only the parts the client reads)."""
    result = None
    if done:
        result = {"cv": {"summary": {"rmse": {"mean": 53.2, "naive_interval_95": [50.1, 56.3]}}},
                  "baseline": {"summary": {"rmse": {"mean": 70.4}}},
                  "holdout": {"released": decision is not None, "mode": "ladder",
                              "scores": {"rmse": 54.0} if decision else None, "withheld_until": None, "note": None},
                  "verdict": None if decision is None else {
                      "decision": decision, "reasons": [f"the candidate's verdict is {decision}"],
                      "primary_metric": "rmse"}}
    return {"id": SUB, "dataset": CONFIG["dataset"], "label": "ridge for CI", "state": state,
            "progress": {"folds_done": done, "folds_total": total}, "error": None, "result": result}


def life(decision: str = "pass") -> list[dict[str, Any]]:
    """What successive polls see: folds finishing (one answer repeats, so a 304 must come), then a verdict."""
    return [document("running", 1), document("running", 3), document("running", 3), document("running", 5),
            document("succeeded", 5, decision)]


class Stub:
    """A scripted sealfold: POST answers ``post``, each GET of the submission the next of ``polls``."""

    def __init__(self) -> None:
        self.post: tuple[int, dict[str, Any]] = (202, document("queued", 0))
        self.polls: list[dict[str, Any]] = life()
        self.get_status: int | None = None
        self.seen: list[tuple[str, str, dict[str, str], bytes]] = []
        self.not_modified = 0
        self._index = 0
        stub = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args: Any) -> None:
                pass

            def _send(self, status: int, body: dict[str, Any] | None, headers: dict[str, str] | None = None) -> None:
                raw = b"" if body is None else json.dumps(body).encode()
                self.send_response(status)
                kind = "application/problem+json" if status >= 400 else "application/json"
                for name, value in {"Content-Type": kind, "Content-Length": str(len(raw)), **(headers or {})}.items():
                    self.send_header(name, value)
                self.end_headers()
                self.wfile.write(raw)

            def _record(self) -> None:
                length = int(self.headers.get("Content-Length") or 0)
                stub.seen.append((self.command, self.path, dict(self.headers.items()), self.rfile.read(length)))

            def do_POST(self) -> None:
                self._record()
                self._send(*stub.post)

            def do_GET(self) -> None:
                self._record()
                if stub.get_status is not None:
                    self._send(stub.get_status, problem(stub.get_status, "the records database is not reachable"))
                    return
                current = stub.polls[min(stub._index, len(stub.polls) - 1)]
                stub._index += 1
                etag = '"' + hashlib.sha256(json.dumps(current, sort_keys=True).encode()).hexdigest() + '"'
                if self.headers.get("If-None-Match") == etag:
                    stub.not_modified += 1
                    self._send(304, None, {"ETag": etag})
                else:
                    self._send(200, current, {"ETag": etag})

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"

    def keys_sent(self) -> list[str]:
        return [h.get("Idempotency-Key", "") for method, _, h, _ in self.seen if method == "POST"]


def problem(status: int, detail: str, errors: list[dict[str, str]] | None = None) -> dict[str, Any]:
    body: dict[str, Any] = {"type": "urn:sealfold:problem:x", "title": "Problem", "status": status, "detail": detail}
    if errors:
        body["errors"] = errors
    return body


@pytest.fixture
def stub() -> Iterator[Stub]:
    server = Stub()
    thread = threading.Thread(target=server.server.serve_forever, daemon=True)
    thread.start()
    yield server
    server.server.shutdown()
    server.server.server_close()


@pytest.fixture
def config_file(tmp_path: Path) -> Path:
    path = tmp_path / "ridge.json"
    path.write_text(json.dumps(CONFIG, indent=2))
    return path


def run_cli(url: str, *argv: str, key: str = "sf_test", **env: str) -> subprocess.CompletedProcess[str]:
    """Run ``sealfold`` as a separate process with SEALFOLD_URL/SEALFOLD_KEY set; stderr is a pipe."""
    environ = {**os.environ, "SEALFOLD_URL": url, "SEALFOLD_KEY": key, **env}
    return subprocess.run([sys.executable, "-m", "service.cli", *argv], capture_output=True, text=True,
                          env=environ, timeout=60, check=False)


# -- exit codes against the scripted service --------------------------------------------------------

@pytest.mark.parametrize(("decision", "code"), [("pass", 0), ("fail", 1), ("inconclusive", 1)])
def test_submit_wait_exits_by_the_verdict(stub: Stub, config_file: Path, decision: str, code: int) -> None:
    stub.polls = life(decision)
    done = run_cli(stub.url, "submit", str(config_file), "--wait", "--poll", "0.05")
    assert done.returncode == code, done.stderr
    assert f"verdict: {decision.upper()}" in done.stdout and f"the candidate's verdict is {decision}" in done.stdout
    assert f"{stub.url}/v1/submissions/{SUB}/report" in done.stdout
    # stderr is a pipe: one plain line per change of progress, no carriage returns.
    assert "\r" not in done.stderr
    lines = done.stderr.splitlines()
    assert lines == [f"{SUB}: 0/5 folds done, queued", f"{SUB}: 1/5 folds done, running",
                     f"{SUB}: 3/5 folds done, running", f"{SUB}: 5/5 folds done, scoring the holdout",
                     f"{SUB}: 5/5 folds done, succeeded"]
    # Polls after the first carry the ETag; the repeated answer came back as a 304.
    gets = [h for method, _, h, _ in stub.seen if method == "GET"]
    assert "If-None-Match" not in gets[0] and all("If-None-Match" in h for h in gets[1:])
    assert stub.not_modified == 1


def test_a_failed_run_or_a_cancel_exits_1(stub: Stub, config_file: Path) -> None:
    failed = {**document("failed", 5), "error": "every fold failed: Input contains NaN"}
    stub.polls = [failed]
    done = run_cli(stub.url, "submit", str(config_file), "--wait", "--poll", "0.05")
    assert done.returncode == 1 and "Input contains NaN" in done.stdout
    stub.polls, stub._index = [document("canceled", 2)], 0
    assert run_cli(stub.url, "submit", str(config_file), "--wait", "--poll", "0.05").returncode == 1


def test_json_prints_the_final_document(stub: Stub, config_file: Path) -> None:
    done = run_cli(stub.url, "submit", str(config_file), "--wait", "--json", "--poll", "0.05")
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout) == document("succeeded", 5, "pass")


def test_without_wait_submit_prints_the_id_and_exits_0(stub: Stub, config_file: Path) -> None:
    done = run_cli(stub.url, "submit", str(config_file))
    assert (done.returncode, done.stdout) == (0, SUB + "\n")
    assert [m for m, *_ in stub.seen] == ["POST"]
    _, path, headers, body = stub.seen[0]
    assert path == "/v1/submissions" and headers["Authorization"] == "Bearer sf_test"
    assert json.loads(body) == CONFIG


def test_the_idempotency_key_follows_the_file_and_the_dataset(stub: Stub, config_file: Path) -> None:
    for _ in range(2):
        assert run_cli(stub.url, "submit", str(config_file)).returncode == 0
    run_cli(stub.url, "submit", str(config_file), "--dataset", "ds_other")
    config_file.write_text(json.dumps({**CONFIG, "label": "ridge, second try"}))
    run_cli(stub.url, "submit", str(config_file))
    first, rerun, other_dataset, other_file = stub.keys_sent()
    assert first == rerun and first.startswith("cli-")
    assert len({first, other_dataset, other_file}) == 3
    assert json.loads(stub.seen[2][3])["dataset"] == "ds_other"


def test_a_refused_configuration_exits_2_with_its_field_errors(stub: Stub, config_file: Path) -> None:
    stub.post = (422, problem(422, "estimator 'Rigde' is not in the catalog", [
        {"pointer": "/model/estimator", "detail": "estimator 'Rigde' is not in the catalog; use one of: Ridge"}]))
    done = run_cli(stub.url, "submit", str(config_file), "--wait")
    assert done.returncode == 2 and done.stdout == ""
    assert "422 Problem: estimator 'Rigde' is not in the catalog" in done.stderr
    assert "  /model/estimator: estimator 'Rigde' is not in the catalog; use one of: Ridge" in done.stderr


@pytest.mark.parametrize("status", [401, 403, 404, 409])
def test_other_client_errors_exit_2(stub: Stub, config_file: Path, status: int) -> None:
    stub.post = (status, problem(status, f"refused with {status}"))
    done = run_cli(stub.url, "submit", str(config_file))
    assert done.returncode == 2 and f"refused with {status}" in done.stderr


def test_service_trouble_exits_3(stub: Stub, config_file: Path) -> None:
    stub.post = (503, problem(503, "no worker answered the configuration check"))
    done = run_cli(stub.url, "submit", str(config_file), "--wait")
    assert done.returncode == 3 and "no worker answered" in done.stderr
    stub.post, stub.get_status = (202, document("queued", 0)), 500
    done = run_cli(stub.url, "submit", str(config_file), "--wait", "--poll", "0.05")
    assert done.returncode == 3 and "500" in done.stderr


def test_an_unreachable_service_exits_3(config_file: Path) -> None:
    done = run_cli(f"http://127.0.0.1:{free_port()}", "submit", str(config_file), "--wait")
    assert done.returncode == 3 and "cannot reach the service" in done.stderr


def test_waiting_past_the_timeout_exits_3_and_names_the_submission(stub: Stub, config_file: Path) -> None:
    stub.polls = [document("running", 2)]
    done = run_cli(stub.url, "submit", str(config_file), "--wait", "--timeout", "0.4", "--poll", "0.05")
    assert done.returncode == 3
    assert "gave up waiting after 0.4 s" in done.stderr and f"sealfold status {SUB}" in done.stderr


def test_usage_errors_exit_2(stub: Stub, config_file: Path, tmp_path: Path) -> None:
    not_json = tmp_path / "broken.json"
    not_json.write_text("{ model: Ridge")
    no_dataset = tmp_path / "nodataset.json"
    no_dataset.write_text(json.dumps({"model": {"estimator": "Ridge"}}))
    cases = {
        "cannot read": run_cli(stub.url, "submit", str(tmp_path / "missing.json")),
        "is not valid JSON": run_cli(stub.url, "submit", str(not_json)),
        "names no dataset": run_cli(stub.url, "submit", str(no_dataset)),
        "no service URL": run_cli("", "submit", str(config_file)),
        "no API key": run_cli(stub.url, "submit", str(config_file), key=""),
        "must be http(s)": run_cli("localhost:8080", "submit", str(config_file)),
        "invalid": run_cli(stub.url, "submit", str(config_file), "--timeout", "soon"),
    }
    for said, done in cases.items():
        assert done.returncode == 2, (said, done.stderr)
        assert said in done.stderr, (said, done.stderr)
    assert stub.seen == []  # nothing was sent for any of them
    assert run_cli(stub.url, "submit", str(no_dataset), "--dataset", "ds_x").returncode == 0


def test_progress_is_a_bar_on_a_terminal(stub: Stub, config_file: Path) -> None:
    leader, follower = pty.openpty()
    environ = {**os.environ, "SEALFOLD_URL": stub.url, "SEALFOLD_KEY": "sf_test"}
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "submit", str(config_file), "--wait",
                             "--poll", "0.05"], stdout=subprocess.PIPE, stderr=follower, env=environ)
    os.close(follower)
    seen = b""
    while True:
        try:
            chunk = os.read(leader, 4096)
        except OSError:  # the child closed its end
            break
        if not chunk:
            break
        seen += chunk
    assert proc.wait(timeout=60) == 0
    os.close(leader)
    assert proc.stdout is not None and b"verdict: PASS" in proc.stdout.read()
    text = seen.decode()
    assert f"\r{SUB} [" + "#" * 14 + "-" * 10 + "] 3/5 folds" in text  # drawn in place
    assert "#" * 24 + "] 5/5 folds" in text and text.endswith("\n")


def test_the_client_stays_light() -> None:
    """The client needs no server-side library: it must work from a bare CI runner."""
    code = ("import sys\nfrom service.cli import main, remote\n"
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'flask', 'sqlalchemy', 'redis', 'numpy', "
            "'pandas', 'sklearn', 'rq', 'marshmallow'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout + out.stderr


def test_text_from_the_service_cannot_drive_the_terminal() -> None:
    doc = document("succeeded", 5, "fail")
    doc["label"] = "evil\x1b[2J\x1b]0;owned\x07"
    text = remote.summary_text(doc, "http://x")
    assert "\x1b" not in text and "\x07" not in text and "evil" in text


# -- against the real API ---------------------------------------------------------------------------

@pytest.fixture
def served(api: Api) -> Iterator[str]:
    with ServedApp(api.app) as live:
        yield live.url


def test_submit_against_the_real_api_replays_a_rerun(
    api: Api, dataset: dict[str, Any], served: str, tmp_path: Path, worker_says_ok: list[dict[str, Any]]
) -> None:
    path = tmp_path / "ridge.json"
    path.write_text(json.dumps({"model": {"estimator": "Ridge", "features": ["age", "bmi", "bp"]},
                                "metrics": ["rmse"], "label": "from CI"}))
    key = api.tokens["submitter"]
    first = run_cli(served, "submit", str(path), "--dataset", dataset["id"], key=key)
    assert first.returncode == 0, first.stderr
    sub_id = first.stdout.strip()
    assert sub_id.startswith("sub_")
    again = run_cli(served, "submit", str(path), "--dataset", dataset["id"], "--json", key=key)
    assert again.returncode == 0 and json.loads(again.stdout)["id"] == sub_id
    other = run_cli(served, "submit", str(path), "--dataset", dataset["id"], key=api.tokens["submitter2"])
    assert other.returncode == 0 and other.stdout.strip() == sub_id  # a teammate's resubmission is told so
    assert f"already submitted on this dataset as {sub_id}" in other.stderr and "no verdict yet" in other.stderr
    assert len(worker_says_ok) == 1  # the rerun was answered from the first submission, nothing re-checked
    refused = run_cli(served, "submit", str(path), "--dataset", "ds_nope", key=key)
    assert refused.returncode == 2 and "/dataset: no dataset 'ds_nope'" in refused.stderr
    assert run_cli(served, "datasets", key="sf_wrong").returncode == 2


def test_status_board_and_datasets_against_the_real_api(api: Api, dataset: dict[str, Any], served: str) -> None:
    owner = api.key_ids["submitter"]
    best = make_submission(api.engine, dataset, owner, label="best", scores=[50, 51, 49, 52, 48])
    make_submission(api.engine, dataset, owner, label="second", scores=[60, 61, 59, 62, 58], decision="fail")
    api.post("steward", f"/v1/datasets/{dataset['id']}/champion", json={"submission": best})
    key = api.tokens["submitter"]

    board = run_cli(served, "board", dataset["id"], key=key)
    assert board.returncode == 0, board.stderr
    rows = [line.split() for line in board.stdout.splitlines()]
    assert rows[2][:4] == ["1", "*", best, "best"] and rows[3][:3] == ["2", rows[3][1], "second"]
    assert "ranked by rmse (lower is better)" in board.stdout and "* champion" in board.stdout
    as_json = json.loads(run_cli(served, "board", dataset["id"], "--json", "--limit", "1", key=key).stdout)
    assert [e["label"] for e in as_json["entries"]] == ["best"] and as_json["next_cursor"]

    status = run_cli(served, "status", best, key=key)
    assert status.returncode == 0 and "CV 50" in status.stdout
    # Needs the submission document of the review gate (result.verdict, result.holdout from the release).
    assert "verdict: PASS" in status.stdout and "holdout 50 (exact)" in status.stdout, status.stdout
    assert str(RAW_HOLDOUT)[:5] not in status.stdout
    assert json.loads(run_cli(served, "status", best, "--json", key=key).stdout)["id"] == best
    assert run_cli(served, "status", "sub_nope", key=key).returncode == 2

    listed = run_cli(served, "datasets", key=key)
    assert listed.returncode == 0 and dataset["id"] in listed.stdout and "diabetes" in listed.stdout
    assert json.loads(run_cli(served, "datasets", "--json", key=key).stdout)["datasets"][0]["id"] == dataset["id"]
    assert run_cli(served, "board", dataset["id"], key=api.tokens["other_submitter"]).returncode == 2


def test_cli_parses_the_client_commands() -> None:
    args = main.build_parser().parse_args(["submit", "c.json", "--wait", "--timeout", "90", "--dataset", "ds_1"])
    assert (args.command, args.config, args.wait, args.timeout, args.dataset, args.json) == (
        "submit", "c.json", True, 90.0, "ds_1", False)
    assert main.build_parser().parse_args(["board", "ds_1"]).limit == 20
