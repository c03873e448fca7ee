"""Benchmark: a second team's latency (POST -> succeeded) while a first team's burst is queued, beside idle.

An embedded stack (redis-server, API, 2 fold workers, 1 checker, SQLite) in a temporary directory, with no
live-submission cap (``SEALFOLD_TEAM_MAX_LIVE=0``) so the whole burst is accepted, and the per-team running
cap given by ``--running-cap`` (0: none, round robin alone). Two teams each register scikit-learn's diabetes
table. First, on the idle stack, team B POSTs ``--probes`` Ridge configurations back to back and each one's
POST -> succeeded time is taken. Then team A POSTs ``--burst`` Ridge configurations (5 folds each: 8 jobs a
submission), and as soon as the last is accepted team B POSTs its probes again, back to back. Printed: B's
latency idle and during the burst (median and max), how many of A's submissions were still unfinished when
each probe of B succeeded, and when A's burst drained. (One queue in FIFO order would finish B's probes only
after the whole burst: none of A's left unfinished.)

Run: ``python -m bench.fair_queue`` (``--burst 300``; ``--burst 60`` for a quick run). It asserts nothing;
figures on a shared machine are noisy.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

from sklearn.datasets import load_diabetes
from sqlalchemy import Engine

from service.cli import embedded, supervisor
from service.cli.client import ServiceClient
from service.records import submissions
from service.records.engine import make_engine
from service.records.keys import create_key
from service.settings import Settings

FINISHED = ("succeeded", "failed", "canceled")


def _register(steward: ServiceClient, name: str) -> str:
    data = load_diabetes(as_frame=True).frame.to_csv(index=False).encode()
    reply = steward.upload("/v1/datasets", "diabetes.csv", data, {"name": name, "target": "target",
                                                                   "task": "regression"})
    if reply.status != 201:
        raise SystemExit(f"registering {name} answered {reply.status}: {reply.text}")
    return str(reply.json()["id"])


def _post(client: ServiceClient, dataset_id: str, alpha: float) -> str:
    reply = client.post("/v1/submissions", json_body={"dataset": dataset_id,
                                                      "model": {"estimator": "Ridge", "params": {"alpha": alpha}}})
    if reply.status != 202:
        raise SystemExit(f"a submission answered {reply.status}: {reply.text}")
    return str(reply.json()["id"])


def _state(client: ServiceClient, sub_id: str) -> str:
    return str(client.get(f"/v1/submissions/{sub_id}").json()["state"])


def _probe(client: ServiceClient, dataset_id: str, alphas: list[float], watch: Engine | None = None,
           timeout: float = 1800) -> tuple[list[float], list[int]]:
    """POST one configuration per alpha, back to back; poll until each is finished.

    Returns each one's seconds from its POST to succeeded and, for each, how many of team A's submissions
    were queued or running at that moment (read from the records DB ``watch``, when given).
    """
    posted = [(time.perf_counter(), _post(client, dataset_id, a)) for a in alphas]
    seconds: dict[str, float] = {}
    behind: dict[str, int] = {}
    deadline = time.monotonic() + timeout
    while len(seconds) < len(posted):
        for began, sub_id in posted:
            if sub_id in seconds:
                continue
            state = _state(client, sub_id)
            if state in FINISHED:
                if state != "succeeded":
                    raise SystemExit(f"probe {sub_id} {state}")
                seconds[sub_id] = time.perf_counter() - began
                behind[sub_id] = submissions.count_live(watch, "team-a") if watch is not None else 0
        if time.monotonic() > deadline:
            raise SystemExit(f"probes unfinished after {timeout} s")
        time.sleep(0.02)
    return [seconds[s] for _, s in posted], [behind[s] for _, s in posted]


def _clients(base_url: str, engine: Engine) -> dict[str, ServiceClient]:
    keys = {who: create_key(engine, team, role, who)[1] for who, team, role in (
        ("a_steward", "team-a", "steward"), ("a", "team-a", "submitter"),
        ("b_steward", "team-b", "steward"), ("b", "team-b", "submitter"))}
    return {who: ServiceClient(base_url, token, timeout=120) for who, token in keys.items()}


def _figures(label: str, seconds: list[float]) -> str:
    return f"{label}: median {statistics.median(seconds):.2f} s, max {max(seconds):.2f} s over {len(seconds)}"


def run(args: argparse.Namespace, tmp: str) -> dict[str, Any]:
    env = {"SEALFOLD_LOG_LEVEL": "WARNING", "SEALFOLD_QUEUE": "fairbench", "SEALFOLD_TEAM_MAX_LIVE": "0",
           "SEALFOLD_TEAM_MAX_RUNNING": str(args.running_cap)}
    options = embedded.StackOptions(data_dir=Path(tmp) / "data", port=0, workers=args.workers, extra_env=env)
    with supervisor.Supervisor() as sup:
        print(f"starting an embedded stack: {args.workers} fold workers and a checker, running cap "
              f"{args.running_cap or 'none'}, in {tmp}", flush=True)
        stack = embedded.start_stack(sup, options)
        engine = make_engine(Settings.load(environ=stack.env))
        clients = _clients(stack.base_url, engine)
        a_data, b_data = _register(clients["a_steward"], "diabetes-a"), _register(clients["b_steward"], "diabetes-b")
        _probe(clients["b"], b_data, [0.001])  # warm the checker's sample cache and every worker's data cache
        _probe(clients["a"], a_data, [0.001])
        idle, _ = _probe(clients["b"], b_data, [0.01 + i * 0.01 for i in range(args.probes)])
        print(_figures("team B idle", idle), flush=True)

        began = time.perf_counter()
        burst = [_post(clients["a"], a_data, 0.1 + i * 0.001) for i in range(args.burst)]
        posted = time.perf_counter() - began
        print(f"team A posted {len(burst)} submissions in {posted:.1f} s; "
              f"{submissions.count_live(engine, 'team-a')} unfinished", flush=True)
        loaded, behind = _probe(clients["b"], b_data, [5.0 + i * 0.01 for i in range(args.probes)], engine)
        print(_figures("team B during A's burst", loaded), flush=True)
        print(f"A's submissions still unfinished as each probe of B succeeded: {behind}", flush=True)
        while (left := submissions.count_live(engine, "team-a")) and time.perf_counter() - began < 3600:
            time.sleep(0.5)
        engine.dispose()
        drained = time.perf_counter() - began
        print(f"A's burst drained {drained:.1f} s after its first POST ({left} left)", flush=True)
    return {"idle": idle, "loaded": loaded, "behind": behind, "drained": drained}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--burst", type=int, default=300, help="team A's submissions (default 300)")
    parser.add_argument("--probes", type=int, default=3, help="team B's submissions, idle and loaded (default 3)")
    parser.add_argument("--workers", type=int, default=2, help="fold workers (default 2)")
    parser.add_argument("--running-cap", type=int, default=0,
                        help="SEALFOLD_TEAM_MAX_RUNNING (default 0: no cap, round robin alone)")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="sealfold-fairbench-") as tmp:
        figures = run(args, tmp)
    ratio = statistics.median(figures["loaded"]) / statistics.median(figures["idle"])
    print(f"\nteam B's median latency during a {args.burst}-submission burst of team A is {ratio:.1f}x its idle "
          f"median ({args.workers} fold workers, running cap {args.running_cap or 'none'}; one run on a shared, "
          "noisy machine)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
