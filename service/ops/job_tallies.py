"""Counts of jobs by kind and outcome, kept in Redis by every worker and read by ``/metrics``.

Workers run on many hosts, so a per-process counter would be lost with its process and could not be
scraped; one Redis hash holds them for the whole deployment. Outcomes: ``started``, ``finished``,
``failed`` (the job raised), ``timed_out`` (the job's timeout killed it) and ``retried`` (a failed run
that RQ will run again). A FLUSHALL resets them, which Prometheus reads as a counter reset.
"""

from __future__ import annotations

import contextlib

from redis import Redis
from redis.exceptions import RedisError

TALLY_KEY = "sealfold:tally:jobs"
OUTCOMES = ("started", "finished", "failed", "timed_out", "retried")
# worker.jobs function name -> the kind shown in metrics.
KINDS = {
    "check_config": "check",
    "run_fold": "fold",
    "run_folds": "fold",
    "summarize": "summary",
    "score_holdout": "holdout",
    "give_verdict": "verdict",
}


def kind_of(func_name: str | None) -> str:
    """The metrics kind of a job function's dotted name (``other`` when it is none of sealfold's)."""
    return KINDS.get((func_name or "").rsplit(".", 1)[-1], "other")


def record(redis: Redis, func_name: str | None, outcome: str, *, private: bool = True) -> None:
    """Add one job outcome; a Redis error is swallowed (a tally must never fail a job).

    ``private``: only operators can read ``/metrics`` (``SEALFOLD_METRICS_TOKEN`` is set). When anyone can,
    a holdout job's end is not tallied: when and how it ended (finished, failed, timed out, retried) can
    depend on the sealed rows, and a scrape every second would time it (``service.gate.timing``).
    """
    if outcome not in OUTCOMES:
        raise ValueError(f"unknown job outcome {outcome!r}")
    if not private and outcome != "started" and kind_of(func_name) == "holdout":
        return
    with contextlib.suppress(RedisError):
        redis.hincrby(TALLY_KEY, f"{kind_of(func_name)}|{outcome}", 1)


def read(redis: Redis) -> dict[tuple[str, str], int]:
    """Return ``{(kind, outcome): count}`` for every kind and outcome (zeros included)."""
    counts = {(kind, outcome): 0 for kind in (*KINDS.values(), "other") for outcome in OUTCOMES}
    for field, value in redis.hgetall(TALLY_KEY).items():
        kind, _, outcome = (field.decode() if isinstance(field, bytes) else str(field)).partition("|")
        if (kind, outcome) in counts:
            counts[(kind, outcome)] = int(value)
    return counts
