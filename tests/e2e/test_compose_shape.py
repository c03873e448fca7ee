"""The compose file's deployment, run without containers (this machine has no Docker daemon).

Read from ``docker/compose.yaml`` and ``docker/Dockerfile`` themselves: the one-shot schema service's
command, the workers' command and replica count, the API's command (the image's CMD), their shared
environment and data volume, and both healthchecks. Run here as processes against a PostgreSQL database and a
Redis of the test's own, on one data dir standing for the shared volume: the schema upgrade runs once, both
healthchecks pass, and a submission of scikit-learn's diabetes data goes from POST to a verdict.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
import yaml
from sklearn.datasets import load_diabetes

from service.cli.client import ServiceClient, Trouble
from service.cli.embedded import register_dataset
from tests.support.servers import free_port, postgres_database, sealfold_argv, stop_processes

pytestmark = [pytest.mark.postgres, pytest.mark.slow]

DOCKER = Path(__file__).resolve().parents[2] / "docker"
BIN = Path(sys.prefix) / "bin"


def _compose() -> dict[str, Any]:
    return yaml.safe_load((DOCKER / "compose.yaml").read_text())  # merge keys (<<) resolved by the loader


def _image_cmd() -> list[str]:
    text = (DOCKER / "Dockerfile").read_text()
    cmd = text[text.index("\nCMD ") + 5:].replace("\\\n", " ")
    return list(json.loads(cmd.split("\n", 1)[0]))


def _local(argv: list[str]) -> list[str]:
    """The container's command with the venv's executables (``sealfold`` through the test's interpreter)."""
    if argv[0] == "sealfold":
        return [*sealfold_argv(), *argv[1:]]
    if argv[0] == "python":
        return [sys.executable, *argv[1:]]
    return [str(BIN / argv[0]), *argv[1:]]


def test_the_compose_grace_period_covers_a_fold_timeout() -> None:
    services = _compose()["services"]
    timeout = int(services["worker"]["environment"]["SEALFOLD_FOLD_TIMEOUT"])
    grace = services["worker"]["stop_grace_period"]
    assert grace.endswith("s") and int(grace[:-1]) >= timeout
    assert services["api"]["environment"]["SEALFOLD_FOLD_TIMEOUT"] == str(timeout)


@pytest.mark.timeout(420)
def test_the_compose_shape_serves_a_submission_end_to_end(tmp_path: Path, redis_url: str) -> None:
    services = _compose()["services"]
    port = free_port()
    procs: list[subprocess.Popen[bytes]] = []
    with postgres_database() as url:
        def env_of(service: str) -> dict[str, str]:
            declared = {k: str(v) for k, v in services[service]["environment"].items()}
            declared.update(DATABASE_URL=url, REDIS_URL=redis_url, SEALFOLD_DATA_DIR=str(tmp_path / "data"))
            if "PROMETHEUS_MULTIPROC_DIR" in declared:
                declared["PROMETHEUS_MULTIPROC_DIR"] = str(tmp_path / "metrics")
            return {**os.environ, **declared}

        schema = subprocess.run(_local(services["schema"]["command"]), env=env_of("schema"), capture_output=True,
                                text=True, timeout=120)
        assert schema.returncode == 0, schema.stderr
        log = (tmp_path / "stack.log").open("wb")
        try:
            for _ in range(services["worker"]["deploy"]["replicas"]):
                procs.append(subprocess.Popen(_local(services["worker"]["command"]), env=env_of("worker"),
                                              stdout=log, stderr=subprocess.STDOUT))
            api_cmd = [a if a != "0.0.0.0:8080" else f"127.0.0.1:{port}" for a in _image_cmd()]
            procs.append(subprocess.Popen(_local(api_cmd), env=env_of("api"), stdout=log, stderr=subprocess.STDOUT))
            api_check = [a.replace("127.0.0.1:8080", f"127.0.0.1:{port}")
                         for a in services["api"]["healthcheck"]["test"][1:]]
            worker_check = services["worker"]["healthcheck"]["test"][1:]
            deadline = time.monotonic() + 180
            healthy = {"api": False, "worker": False}
            while not all(healthy.values()) and time.monotonic() < deadline:
                assert all(p.poll() is None for p in procs), (tmp_path / "stack.log").read_text()[-3000:]
                healthy["api"] = subprocess.run(_local(api_check), env=env_of("api"),
                                                capture_output=True).returncode == 0
                healthy["worker"] = subprocess.run(_local(worker_check), env=env_of("worker"),
                                                   capture_output=True).returncode == 0
                time.sleep(1)
            assert all(healthy.values()), (healthy, (tmp_path / "stack.log").read_text()[-3000:])

            keys = {}
            for role in ("steward", "submitter"):
                made = subprocess.run([*sealfold_argv(), "keys", "create", "--team", "fleet", "--role", role],
                                      env=env_of("api"), capture_output=True, text=True, timeout=60)
                assert made.returncode == 0, made.stderr
                keys[role] = made.stdout.strip()
            frame = load_diabetes(as_frame=True).frame  # scikit-learn's bundled diabetes data (Efron et al. 2004)
            csv = tmp_path / "diabetes.csv"
            frame.to_csv(csv, index=False)
            base = f"http://127.0.0.1:{port}"
            dataset = register_dataset(base, keys["steward"], {"name": "diabetes", "target": "target",
                                                               "task": "regression"}, csv)
            client = ServiceClient(base, keys["submitter"])
            posted = client.post("/v1/submissions", json_body={
                "dataset": dataset["id"], "model": {"estimator": "Ridge", "params": {"alpha": 1.0}}})
            assert posted.status == 202, posted.text
            sub_id = posted.json()["id"]
            deadline = time.monotonic() + 180
            doc: dict[str, Any] = {}
            while time.monotonic() < deadline:
                doc = client.get(f"/v1/submissions/{sub_id}").json()
                if doc["state"] in ("succeeded", "failed"):
                    break
                time.sleep(0.5)
            assert doc["state"] == "succeeded", doc
            assert doc["result"]["verdict"]["decision"] in ("pass", "fail")
        except Trouble as exc:
            pytest.fail(f"{exc}\n{(tmp_path / 'stack.log').read_text()[-3000:]}")
        finally:
            stop_processes(procs)
            log.close()
