"""The ``sealfold`` command line, the embedded stack's supervision and the invented demo data."""

from __future__ import annotations

import argparse
import io
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from service.cli import demo, embedded, main, stack_up, supervisor
from service.cli.client import ServiceClient
from tests.support.servers import free_port, sealfold_argv

# --- argument parsing -------------------------------------------------------------------------------


def test_up_defaults() -> None:
    args = main.build_parser().parse_args(["up"])
    assert (args.host, args.port, args.workers, args.data_dir, args.no_demo) == (
        "127.0.0.1", 8080, 2, "./var", False,
    )


def test_up_flags() -> None:
    args = main.build_parser().parse_args(
        ["up", "--host", "0.0.0.0", "--port", "0", "--workers", "3", "--data-dir", "/tmp/x", "--no-demo"]
    )
    assert (args.host, args.port, args.workers, args.data_dir, args.no_demo) == ("0.0.0.0", 0, 3, "/tmp/x", True)


@pytest.mark.parametrize("argv", [
    ["up", "--workers", "0"], ["up", "--port", "70000"], ["up", "--port", "http"],
    ["keys", "create", "--team", "t", "--role", "root"], ["keys", "create", "--role", "steward"], [],
])
def test_bad_arguments_exit_2(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exited:
        main.build_parser().parse_args(argv)
    assert exited.value.code == 2
    assert capsys.readouterr().err  # argparse said why


def test_worker_execs_python_m_worker(monkeypatch: pytest.MonkeyPatch) -> None:
    seen: list[list[str]] = []
    monkeypatch.setattr(os, "execv", lambda path, argv: seen.append([path, *argv]))
    assert main.main(["worker", "--burst", "--name", "w7"]) == 0
    assert seen == [[sys.executable, sys.executable, "-m", "worker", "--burst", "--name", "w7"]]
    assert main.worker_argv(argparse.Namespace(burst=False, name=None)) == [sys.executable, "-m", "worker"]


def test_cli_module_imports_nothing_heavy() -> None:
    """The command line stays light: no Flask, scikit-learn, pandas or worker at import time."""
    code = ("import sys, service.cli.main\n"
            "print(sorted(m for m in ('flask', 'sklearn', 'pandas', 'worker') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout + out.stderr


# --- keys create ------------------------------------------------------------------------------------


def test_keys_create_prints_only_a_token_that_authenticates(tmp_path: Path) -> None:
    from service.records.engine import make_engine
    from service.records.keys import authenticate
    from service.settings import Settings

    env = {k: v for k, v in os.environ.items() if k != "DATABASE_URL"}
    env["SEALFOLD_DATA_DIR"] = str(tmp_path)
    subprocess.run([*sealfold_argv(), "db", "upgrade"], capture_output=True, env=env, timeout=60, check=True)
    out = subprocess.run(
        [*sealfold_argv(), "keys", "create", "--team", "fleet", "--role", "steward", "--name", "ci"],
        capture_output=True, text=True, env=env, timeout=60,
    )
    assert out.returncode == 0, out.stderr
    lines = out.stdout.splitlines()
    assert len(lines) == 1 and re.fullmatch(r"\S{20,}", lines[0]), out.stdout
    engine = make_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    try:
        key = authenticate(engine, lines[0])
        assert key is not None and (key.team, key.role, key.name) == ("fleet", "steward", "ci")
        assert authenticate(engine, lines[0] + "x") is None
    finally:
        engine.dispose()


def test_demo_keys_without_the_demo_are_created_once_per_records_db(tmp_path: Path) -> None:
    from service.records.keys import authenticate, revoke
    from service.settings import Settings
    from tests.support.records import upgraded_engine

    engine = upgraded_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    try:
        first = stack_up.demo_keys_once(engine)
        assert set(first) == {"steward", "submitter"}
        steward = authenticate(engine, first["steward"])
        assert steward is not None and (steward.team, steward.role) == (demo.DEMO_TEAM, "steward")
        assert stack_up.demo_keys_once(engine) == {} and _key_count(tmp_path) == 2
        # Once both are revoked, the next start creates a usable pair again.
        for token in first.values():
            info = authenticate(engine, token)
            assert info is not None
            revoke(engine, info.id)
        again = stack_up.demo_keys_once(engine)
        assert set(again) == {"steward", "submitter"} and _key_count(tmp_path) == 4
    finally:
        engine.dispose()


def _key_count(data_dir: Path) -> int:
    """Rows in the records DB's key table, revoked ones included (read with sqlite3, not the project)."""
    import sqlite3

    with sqlite3.connect(data_dir / "records.sqlite3") as conn:
        return int(conn.execute("SELECT count(*) FROM api_keys").fetchone()[0])


def test_keys_create_records_an_identity_and_names_a_bad_one(tmp_path: Path) -> None:
    from service.records.engine import make_engine
    from service.records.keys import authenticate
    from service.settings import Settings

    env = {k: v for k, v in os.environ.items() if k != "DATABASE_URL"}
    env["SEALFOLD_DATA_DIR"] = str(tmp_path)
    subprocess.run([*sealfold_argv(), "db", "upgrade"], capture_output=True, env=env, timeout=60, check=True)
    base = [*sealfold_argv(), "keys", "create", "--team", "fleet", "--role", "submitter", "--identity"]
    out = subprocess.run([*base, "ci-nightly"], capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 0, out.stderr
    engine = make_engine(Settings.load({"data_dir": tmp_path, "database_url": ""}, environ={}))
    try:
        key = authenticate(engine, out.stdout.strip())
        assert key is not None and key.budget_identity == "ci-nightly"
    finally:
        engine.dispose()
    bad = subprocess.run([*base, "key_123"], capture_output=True, text=True, env=env, timeout=60)
    assert bad.returncode == 2 and bad.stdout == "" and "identity must be" in bad.stderr


def test_keys_create_refuses_blank_team(tmp_path: Path) -> None:
    env = {**os.environ, "SEALFOLD_DATA_DIR": str(tmp_path)}
    env.pop("DATABASE_URL", None)
    subprocess.run([*sealfold_argv(), "db", "upgrade"], capture_output=True, env=env, timeout=60, check=True)
    out = subprocess.run([*sealfold_argv(), "keys", "create", "--team", " ", "--role", "submitter"],
                         capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 2 and out.stdout == ""
    assert "team" in out.stderr


# --- demo data (invented: a sanity check of our own generator, not a reference) ---------------------


def test_demo_is_seeded_and_deterministic() -> None:
    first, again = demo.make_routes(800, seed=11), demo.make_routes(800, seed=11)
    assert first.equals(again)
    assert not first.equals(demo.make_routes(800, seed=12))
    assert len(demo.make_routes()) == demo.DEMO_ROWS


def test_demo_shape() -> None:
    frame = demo.make_routes()
    assert list(frame.columns) == [
        "route_id", "depot", "distance_km", "stops", "payload_kg", "elevation_gain_m", "fuel_litres",
    ]
    assert frame["route_id"].is_unique
    assert not frame.isna().any().any()
    assert set(frame["depot"]) == set(demo.DEPOT_IDLE_LITRES)
    assert (frame["stops"] >= 1).all() and (frame["distance_km"] > 0).all()


def test_demo_follows_its_formula_plus_noise() -> None:
    frame = demo.make_routes()
    residual = (frame["fuel_litres"] - demo.expected_fuel(frame)).to_numpy()
    n = len(residual)
    # Noise is N(0, 1.5) plus rounding to 0.01 L: mean within 4 standard errors of 0, sd within 10 %.
    assert abs(residual.mean()) < 4 * demo.NOISE_SD_LITRES / np.sqrt(n)
    assert abs(residual.std(ddof=1) / demo.NOISE_SD_LITRES - 1) < 0.10
    # The formula, not the noise, carries the signal.
    assert np.corrcoef(frame["fuel_litres"], demo.expected_fuel(frame))[0, 1] > 0.95


def test_demo_csv_round_trips(tmp_path: Path) -> None:
    import pandas as pd

    path = demo.write_demo_csv(tmp_path, n_rows=200, seed=3)
    assert path.parent == tmp_path / "demo"
    read = pd.read_csv(path)
    assert read["route_id"].tolist() == demo.make_routes(200, seed=3)["route_id"].tolist()
    np.testing.assert_allclose(read["fuel_litres"], demo.make_routes(200, seed=3)["fuel_litres"])


# --- supervision ------------------------------------------------------------------------------------


def _python(code: str) -> list[str]:
    return [sys.executable, "-c", code]


def test_supervisor_reports_a_child_that_dies(tmp_path: Path) -> None:
    with supervisor.Supervisor(grace_seconds=2) as sup:
        sup.start("sleeper", _python("import time; time.sleep(60)"), os.environ, tmp_path)
        sup.start("quitter", _python("print('bye'); raise SystemExit(3)"), os.environ, tmp_path)
        with pytest.raises(supervisor.ChildExited) as exited:
            for _ in range(200):
                sup.sleep(0.05)
        assert exited.value.child.name == "quitter"
        assert "exited with code 3" in str(exited.value)
        assert supervisor.log_tail(exited.value.child.log_path) == "bye"
        sleeper = sup.children[0].process
    assert sleeper.returncode == -signal.SIGTERM


def test_supervisor_restarts_a_restartable_child_until_its_limit(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(supervisor, "BACKOFF_FIRST_SECONDS", 0.01)
    monkeypatch.setattr(supervisor, "RESTART_LIMIT", 3)
    err = io.StringIO()
    with supervisor.Supervisor(grace_seconds=2, err=err) as sup:
        argv = _python("import sys; print('run', sys.argv[-1]); raise SystemExit(4)")
        child = sup.start("flaky", [*argv, "--name", "w"], os.environ, tmp_path, restartable=True)
        with pytest.raises(supervisor.ChildExited) as exited:
            for _ in range(400):
                time.sleep(0.02)
                sup.check(restart=True)
        assert exited.value.child is child and "exited with code 4" in str(exited.value)
    # Three restarts, each with a new name; the log holds every run (appended, not truncated).
    runs = [line for line in child.log_path.read_text().splitlines() if not line.startswith("---- ")]
    assert runs == ["run w", "run w-r1", "run w-r2", "run w-r3"]
    assert err.getvalue().count("restarting in") == 3


def test_a_child_that_is_not_restartable_stops_the_stack_even_while_restarting_others(tmp_path: Path) -> None:
    with supervisor.Supervisor(grace_seconds=2) as sup:
        sup.start("redis-like", _python("raise SystemExit(1)"), os.environ, tmp_path)
        with pytest.raises(supervisor.ChildExited):
            for _ in range(200):
                time.sleep(0.02)
                sup.check(restart=True)


def test_logs_past_the_limit_are_rotated_and_kept(tmp_path: Path) -> None:
    log = tmp_path / "api.log"
    for generation in range(5):
        log.write_bytes(f"generation {generation}\n".encode() * 100)
        assert supervisor.rotate_if_large(log, max_bytes=100, keep=3)
    assert log.read_bytes() == b""
    assert [(tmp_path / f"api.log.{n}").read_text().split("\n")[0] for n in (1, 2, 3)] == [
        "generation 4", "generation 3", "generation 2"]
    assert not (tmp_path / "api.log.4").exists()
    assert not supervisor.rotate_if_large(log, max_bytes=100)  # small enough now


def test_supervisor_kills_a_child_that_ignores_sigterm(tmp_path: Path) -> None:
    code = ("import signal, time; signal.signal(signal.SIGTERM, signal.SIG_IGN); "
            "print('ready', flush=True); time.sleep(60)")
    sup = supervisor.Supervisor(grace_seconds=0.5)
    child = sup.start("stubborn", _python(code), os.environ, tmp_path)
    while "ready" not in child.log_path.read_text():
        time.sleep(0.02)
    started = time.monotonic()
    sup.stop()
    assert child.process.returncode == -signal.SIGKILL
    assert time.monotonic() - started < 5
    assert supervisor.describe_exit(-9) == "was killed by SIGKILL"


def test_one_stack_per_data_dir(tmp_path: Path) -> None:
    held = embedded.lock_data_dir(tmp_path)
    try:
        with pytest.raises(supervisor.StackError, match="another sealfold stack"):
            embedded.lock_data_dir(tmp_path)
    finally:
        held.close()
    embedded.lock_data_dir(tmp_path).close()  # free again once released


def test_waitress_receives_at_most_the_upload_limit_and_the_multipart_framing() -> None:
    # waitress's own default is 1 GiB (waitress.adjustments.Adjustments.max_request_body_size).
    from waitress.adjustments import Adjustments

    assert Adjustments.max_request_body_size == 1024**3
    cap = embedded.waitress_body_cap({"SEALFOLD_MAX_UPLOAD_BYTES": "4096"})
    assert cap == 4096 + embedded.WAITRESS_BODY_SLACK_BYTES < Adjustments.max_request_body_size


# --- sealfold up: the real embedded stack -------------------------------------------------------------


def _children_of(pid: int) -> list[int]:
    found = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            found.append(int(stat.parent.name))
    return found


class UpProcess:
    """A `sealfold up` child of the test, with its output captured to files."""

    def __init__(self, data_dir: Path, *extra: str, workers: int = 1) -> None:
        self.data_dir = data_dir
        self.port = free_port()
        self.out = data_dir.parent / f"{data_dir.name}.stdout"
        self.err = data_dir.parent / f"{data_dir.name}.stderr"
        env = {k: v for k, v in os.environ.items() if k not in ("REDIS_URL", "DATABASE_URL")}
        env["SEALFOLD_LOG_LEVEL"] = "WARNING"
        with self.out.open("wb") as out, self.err.open("wb") as err:
            self.proc = subprocess.Popen(
                [*sealfold_argv(), "up", "--data-dir", str(data_dir), "--port", str(self.port),
                 "--workers", str(workers), *extra],
                stdout=out, stderr=err, env=env,
            )

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def stdout(self) -> str:
        return self.out.read_text(errors="replace")

    def stderr(self) -> str:
        return self.err.read_text(errors="replace")

    def wait_up(self, timeout: float = 120.0) -> str:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if "Press Ctrl-C to stop." in self.stdout():
                return self.stdout()
            if self.proc.poll() is not None:
                pytest.fail(f"sealfold up exited with {self.proc.returncode}:\n{self.stderr()}")
            time.sleep(0.1)
        pytest.fail(f"sealfold up not ready within {timeout} s:\n{self.stdout()}\n{self.stderr()}")

    def stop(self, timeout: float = 60.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=timeout)


@pytest.fixture
def up_processes() -> Iterator[list[UpProcess]]:
    started: list[UpProcess] = []
    yield started
    for up in started:
        if up.proc.poll() is None:
            up.proc.kill()
            up.proc.wait()


@pytest.mark.slow
@pytest.mark.timeout(240)
def test_up_no_demo_side_by_side_and_clean_sigterm(tmp_path: Path, up_processes: list[UpProcess]) -> None:
    """Two stacks with different data dirs run at once; SIGTERM stops every child; a dead child is reported."""
    first, second = UpProcess(tmp_path / "one", "--no-demo"), UpProcess(tmp_path / "two", "--no-demo")
    up_processes += [first, second]
    for up in (first, second):
        banner = up.wait_up()
        assert f"sealfold is up at {up.url}" in banner
        assert ServiceClient(up.url).get("/readyz").status == 200
        assert (up.data_dir / "redis.sock").exists() and (up.data_dir / "records.sqlite3").exists()
    # The printed submitter key authenticates against its own stack only.
    token = re.search(r"submitter: (\S+)", first.stdout()).group(1)  # type: ignore[union-attr]
    assert ServiceClient(first.url, token).get("/v1/catalog").status == 200
    assert ServiceClient(second.url, token).get("/v1/catalog").status == 401

    # A second stack on a data dir in use is refused at once.
    clash = UpProcess(tmp_path / "one", "--no-demo")
    up_processes.append(clash)
    assert clash.proc.wait(timeout=60) == 1
    assert "another sealfold stack" in clash.stderr()

    # SIGTERM: exit 0, every child (redis, API, worker, checker) gone, the port closed, the socket removed.
    children = _children_of(first.proc.pid)
    assert len(children) == 4, children
    assert first.stop() == 0, first.stderr()
    assert not [pid for pid in children if Path(f"/proc/{pid}").exists()]
    assert not (first.data_dir / "redis.sock").exists()
    assert ServiceClient(second.url).get("/readyz").status == 200  # the other stack did not notice

    # A child that dies and is not restarted (redis; a worker or the API is restarted, see below): reported
    # with how it ended, the rest stopped, exit code non-zero.
    children = _children_of(second.proc.pid)
    redis_pid = next(pid for pid in children if "redis" in Path(f"/proc/{pid}/cmdline").read_text())
    os.kill(redis_pid, signal.SIGKILL)
    assert second.proc.wait(timeout=60) == 1
    assert re.search(r"redis \(pid \d+\) was killed by SIGKILL", second.stderr()), second.stderr()
    assert not [pid for pid in children if Path(f"/proc/{pid}").exists()]


@pytest.mark.slow
@pytest.mark.timeout(240)
def test_up_no_demo_twice_on_one_data_dir_creates_no_more_keys(tmp_path: Path, up_processes: list[UpProcess]) -> None:
    """The second start of a data dir without the demo prints how to make a key instead of minting two more."""
    first = UpProcess(tmp_path / "keys", "--no-demo")
    up_processes.append(first)
    token = re.search(r"submitter: (\S+)", first.wait_up()).group(1)  # type: ignore[union-attr]
    assert first.stop() == 0, first.stderr()
    keys_after_first = _key_count(tmp_path / "keys")

    again = UpProcess(tmp_path / "keys", "--no-demo")
    up_processes.append(again)
    banner = again.wait_up()
    assert "submitter: " not in banner and "sealfold keys create --team demo" in banner
    assert ServiceClient(again.url, token).get("/v1/catalog").status == 200  # the first start's key still works
    assert again.stop() == 0, again.stderr()
    assert _key_count(tmp_path / "keys") == keys_after_first == 2
    # Logs are kept across starts: the API's log holds both starts.
    api_log = (tmp_path / "keys" / "logs" / "api.log").read_text()
    assert api_log.count("---- sealfold up: started") == 2, api_log[-2000:]


@pytest.mark.slow
@pytest.mark.timeout(240)
def test_up_restarts_a_worker_that_dies(tmp_path: Path, up_processes: list[UpProcess]) -> None:
    """A worker killed with SIGKILL is started again (with a new RQ name); the stack and the API stay up."""
    from redis import Redis
    from rq.worker import Worker

    up = UpProcess(tmp_path / "crash", "--no-demo", workers=1)
    up_processes.append(up)
    banner = up.wait_up()
    redis_url = re.search(r"(unix://\S+|redis://\S+)", banner).group(1)  # type: ignore[union-attr]
    redis = Redis.from_url(redis_url)
    (before,) = [w for w in Worker.all(connection=redis) if w.name.endswith("-worker-1")]  # not the checker
    os.kill(before.pid, signal.SIGKILL)
    deadline = time.monotonic() + 90
    names: set[str] = set()
    while time.monotonic() < deadline:
        names = {w.name for w in Worker.all(connection=redis) if "-worker-1" in w.name} - {before.name}
        if names:
            break
        assert up.proc.poll() is None, up.stderr()
        time.sleep(0.2)
    assert names == {f"{before.name}-r1"}, up.stderr()
    assert "worker-1" in up.stderr() and "restarting in 1 s" in up.stderr()
    assert ServiceClient(up.url).get("/healthz").status == 200
    assert up.stop() == 0, up.stderr()


def _parse_printed_curl(banner: str) -> tuple[str, dict[str, str], dict[str, object]]:
    """Split the printed curl command the way a POSIX shell would; return its URL, headers and body."""
    import json
    import shlex

    start = banner.index("curl -sS -i -X POST")
    command = banner[start:].split("\n\n", 1)[0].replace("\\\n", " ")
    words = shlex.split(command)
    headers = dict(words[i + 1].split(": ", 1) for i, w in enumerate(words) if w == "-H")
    body = json.loads(words[words.index("-d") + 1])
    url = next(w for w in words if w.startswith("http"))
    return url, headers, body


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_up_demo_curl_works_and_the_demo_is_reused(tmp_path: Path, up_processes: list[UpProcess]) -> None:
    """The printed curl command submits a Ridge configuration that succeeds; a restart reuses the dataset."""
    first = UpProcess(tmp_path / "demo-dir", workers=2)
    up_processes.append(first)
    banner = first.wait_up()
    dataset_id = re.search(r"Demo dataset (ds_\w+)", banner).group(1)  # type: ignore[union-attr]
    url, headers, body = _parse_printed_curl(banner)
    assert url == f"{first.url}/v1/submissions" and body["dataset"] == dataset_id
    token = headers["Authorization"].removeprefix("Bearer ")
    client = ServiceClient(first.url, token)
    answer = client.post("/v1/submissions", json_body=body)
    assert answer.status == 202, answer.text
    location = answer.headers["location"]
    deadline = time.monotonic() + 120
    while (doc := client.get(location).json())["state"] in ("queued", "running"):
        assert time.monotonic() < deadline, doc
        time.sleep(0.1)
    assert doc["state"] == "succeeded", doc
    assert set(doc["result"]["cv"]["summary"]) == {"rmse", "mae", "r2"}
    # The invented formula is mostly linear: Ridge should explain most of the variance (sanity, not a reference).
    assert doc["result"]["cv"]["summary"]["r2"]["mean"] > 0.9
    assert first.stop() == 0, first.stderr()

    again = UpProcess(tmp_path / "demo-dir", workers=1)
    up_processes.append(again)
    banner = again.wait_up()
    assert f"Demo dataset {dataset_id} " in banner
    # Fresh keys each start; the earlier submission is still readable by the team.
    new_token = re.search(r"submitter: (\S+)", banner).group(1)  # type: ignore[union-attr]
    assert new_token != token
    assert ServiceClient(again.url, new_token).get(location).json()["state"] == "succeeded"
    assert again.stop() == 0, again.stderr()
