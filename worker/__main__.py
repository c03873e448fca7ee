"""``python -m worker``: start one sealfold worker with settings from the environment."""

from __future__ import annotations

import argparse
import os
import sys

# One thread per BLAS/OpenMP pool, set before numpy loads them; limit_threads() covers the rest.
for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

from service.records.schema import SchemaOutOfDate  # noqa: E402
from service.settings import Settings  # noqa: E402
from worker.process.main import run_worker  # noqa: E402


def main(argv: list[str] | None = None) -> None:
    """Parse the command line and run the worker."""
    parser = argparse.ArgumentParser(prog="python -m worker", description="Run a sealfold RQ worker.")
    parser.add_argument("--burst", action="store_true", help="exit once the queues are empty")
    parser.add_argument("--name", default=None, help="worker name shown in RQ (default: random)")
    parser.add_argument("--checker", action="store_true",
                        help="serve only configuration checks, never folds (answers submissions while every "
                             "fold worker is busy)")
    args = parser.parse_args(argv)
    try:
        run_worker(Settings.load(), burst=args.burst, name=args.name, checker=args.checker)
    except SchemaOutOfDate as exc:
        print(f"sealfold worker: {exc}", file=sys.stderr, flush=True)
        sys.exit(2)


if __name__ == "__main__":
    main()
