"""Benchmark: what a team's CI sees -- a burst of small submissions, and the API answering its polling.

For each worker count (2, then 1) an embedded stack (redis-server, SQLite, 2 or 1 workers and a checker)
runs the burst of ``burst.py``; on the 2-worker stack, the API is then also started under gunicorn with
the production settings (``polling.py``) and polled by 4 client processes.

``bench/run.py`` runs this after its size comparison; alone: ``python bench/team_ci.py [--burst 100]``.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

from burst import BurstResult, register_diabetes, report_burst, run_burst
from cpu_time import WORKERS, by_role, difference
from polling import PollingResult, bench_polling, report_polling, start_gunicorn
from redis import Redis

from service.cli import embedded, supervisor
from service.cli.client import ServiceClient
from service.records.engine import make_engine
from service.records.keys import create_key
from service.settings import Settings


@dataclass
class TeamCiResult:
    bursts: list[BurstResult]
    polling: PollingResult | None
    poll_seconds: float

    def report(self) -> None:
        if self.bursts:
            report_burst(self.bursts)
        if self.polling is not None:
            report_polling(self.polling, self.poll_seconds)


def run_team_ci(burst_size: int, poll_seconds: float, worker_counts: tuple[int, ...] = (2, 1)) -> TeamCiResult:
    """Run the burst on each worker count, and the polling benchmark on the first stack."""
    result = TeamCiResult([], None, poll_seconds)
    for index, workers in enumerate(worker_counts):
        with tempfile.TemporaryDirectory(prefix="sealfold-bench-ci-") as tmp:
            data_dir, import_root = Path(tmp) / "data", Path(tmp) / "imports"
            import_root.mkdir()
            env = {"SEALFOLD_IMPORT_ROOT": str(import_root), "SEALFOLD_LOG_LEVEL": "WARNING",
                   "SEALFOLD_QUEUE": "bench", "SEALFOLD_TEAM_MAX_LIVE": "0"}
            options = embedded.StackOptions(data_dir=data_dir, port=0, workers=workers, extra_env=env)
            with supervisor.Supervisor() as sup:
                print(f"starting an embedded stack with {workers} worker(s) for the burst", flush=True)
                stack = embedded.start_stack(sup, options)
                engine = make_engine(Settings.load(environ=stack.env))
                steward_token = create_key(engine, "ci", "steward", "bench")[1]
                submitter_token = create_key(engine, "ci", "submitter", "bench")[1]
                engine.dispose()
                steward = ServiceClient(stack.base_url, steward_token, timeout=120)
                submitter = ServiceClient(stack.base_url, submitter_token, timeout=120)
                dataset_id = register_diabetes(steward, import_root, f"diabetes for {workers} worker(s)")
                if burst_size:
                    roles = {"API": [stack.api.pid], "checker": [stack.checker.pid] if stack.checker else [],
                             WORKERS: [w.pid for w in stack.workers],
                             "redis": [stack.redis.pid] if stack.redis else []}
                    redis = Redis.from_url(stack.redis_url)
                    before, calls_before = by_role(roles), command_calls(redis)
                    burst = run_burst(submitter, dataset_id, workers, burst_size)
                    burst = dataclasses.replace(burst, cpu_seconds=difference(by_role(roles), before),
                                                redis_calls=difference(command_calls(redis), calls_before))
                    redis.close()
                    print(f"  {workers} worker(s): {burst.per_minute:.0f} submissions/min", flush=True)
                    result.bursts.append(burst)
                if index == 0 and poll_seconds > 0:
                    page = submitter.get(f"/v1/submissions?dataset={dataset_id}&limit=1").json()["submissions"]
                    if not page:
                        page = [_one_submission(submitter, dataset_id)]
                    api = start_gunicorn(sup, stack.env, data_dir / "logs")
                    result.polling = bench_polling(api, submitter_token, page[0]["id"], poll_seconds)
    return result


def command_calls(redis: Redis) -> dict[str, float]:
    """How many times each Redis command was called since the server started (``INFO commandstats``)."""
    stats = redis.info("commandstats")
    return {name.removeprefix("cmdstat_"): float(entry["calls"]) for name, entry in stats.items()}


def _one_submission(submitter: ServiceClient, dataset_id: str) -> dict[str, object]:
    burst = run_burst(submitter, dataset_id, 0, 1)
    del burst
    page: list[dict[str, object]] = submitter.get(f"/v1/submissions?dataset={dataset_id}&limit=1").json()["submissions"]
    return page[0]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--burst", type=int, default=100, help="submissions per burst (0: no burst)")
    parser.add_argument("--poll-seconds", type=float, default=5.0, help="seconds per polling figure (0: none)")
    parser.add_argument("--burst-workers", default="2,1", help="worker counts to run the burst on")
    args = parser.parse_args(argv)
    counts = tuple(int(n) for n in args.burst_workers.split(","))
    run_team_ci(args.burst, args.poll_seconds, counts).report()
    return 0


if __name__ == "__main__":
    sys.exit(main())
