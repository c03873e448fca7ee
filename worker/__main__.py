"""``python -m worker``: start one sealfold worker with settings from the environment."""

from __future__ import annotations

import argparse
import os
import sys

# One thread per BLAS/OpenMP pool, set before numpy loads them; limit_threads() covers the rest.
for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

from service.logs import configure_logging  # noqa: E402
from service.ops.data_identity import DataNotShared  # noqa: E402
from service.records.schema import SchemaOutOfDate  # noqa: E402
from service.settings import Settings  # noqa: E402
from worker.process.main import run_worker  # noqa: E402


def main(argv: list[str] | None = None) -> None:
    """Parse the command line and run the worker."""
    parser = argparse.ArgumentParser(prog="python -m worker", description="Run a sealfold RQ worker.")
    parser.add_argument("--burst", action="store_true", help="exit once the queues are empty")
    parser.add_argument("--name", default=None, help="worker name shown in RQ (default: random)")
    parser.add_argument("--healthcheck", action="store_true",
                        help="exit 0 when a worker of this host is registered in Redis with a live heartbeat, else 1")
    parser.add_argument("--checker", action="store_true",
                        help="serve only configuration checks, never folds (answers submissions while every "
                             "fold worker is busy)")
    args = parser.parse_args(argv)
    settings = Settings.load()
    if args.healthcheck:
        sys.exit(healthcheck(settings))
    configure_logging(settings.log_level, settings.log_format)
    try:
        run_worker(settings, burst=args.burst, name=args.name, checker=args.checker)
    except SchemaOutOfDate as exc:
        print(f"sealfold worker: {exc}", file=sys.stderr, flush=True)
        sys.exit(2)
    except DataNotShared as exc:
        print(f"sealfold worker: refusing work: {exc}", file=sys.stderr, flush=True)
        sys.exit(3)


def healthcheck(settings: Settings) -> int:
    """0 when this host runs a live worker (a container's healthcheck), else 1 with the reason on stderr."""
    from redis import Redis
    from redis.exceptions import RedisError

    from service.ops.workers import live_on_this_host

    try:
        names = live_on_this_host(Redis.from_url(settings.redis_url, socket_connect_timeout=3))
    except RedisError as exc:
        print(f"sealfold worker healthcheck: Redis is not reachable: {exc}", file=sys.stderr)
        return 1
    if not names:
        print("sealfold worker healthcheck: no live worker of this host is registered", file=sys.stderr)
        return 1
    print(", ".join(names))
    return 0


if __name__ == "__main__":
    main()
