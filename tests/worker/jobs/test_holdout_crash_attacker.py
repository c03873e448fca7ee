"""A scripted submitter who reads the sealed rows through how the holdout step dies: bits per budget unit.

The sealed rows hold one depot that the development rows lack, one of 16 candidates (as in
test_holdout_attacker.py). The attacker's pipeline is taken to exhaust the memory limit exactly when the
sealed rows hold a depot outside a list it chooses -- simulated at the boundary (predicting on the sealed
rows raises MemoryError then), standing in for a transformer whose allocation grows with what it meets.
It bisects the 16 candidates (log2 16 = 4 bits), reading only the submission document.

- before: a bound reached on the sealed rows was lost work -- the submission failed naming the memory
  limit and nothing was released, so each crash answer cost no budget (replayed here by keeping the attempt
  unspent, which is the handling the job had before the seal marked it);
- after: the attempt is spent at the seal, so the bound is one counted failure told in fixed words.

Run with ``-s`` to see the figures.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from sklearn.datasets import load_diabetes

from service.gate.release import FAILED_NOTE
from service.records import holdout_releases, policies, submissions
from service.submission.document import submission_document
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import holdout
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict

CANDIDATES = [f"depot-{i:02d}" for i in range(16)]
SEALED_DEPOT = "depot-06"
KNOWN = ["north", "south"]


class _Unspent:
    """The attempt as the job kept it before the seal marked it spent: ``opened`` never turns True."""

    def __init__(self, token: str, started: float) -> None:
        self.token, self.started = token, started

    @property
    def opened(self) -> bool:
        return False

    @opened.setter
    def opened(self, value: bool) -> None:
        pass


class CrashAttacker:
    """Asks 'does the sealed table hold a depot outside this list?' through the memory limit."""

    def __init__(self, ctx: WorkerContext, redis: Redis, monkeypatch: pytest.MonkeyPatch) -> None:
        self.ctx, self.redis = ctx, redis
        frame = load_diabetes(as_frame=True).frame  # Efron et al. 2004, bundled with scikit-learn
        frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
        dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
        hold.loc[hold.index[0], "depot"] = SEALED_DEPOT
        self.dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
        policies.put(ctx.engine, self.dataset["id"], {"release": {"mode": "ladder", "budget": 20}}, "key_steward")
        self.allowed: set[str] = set()
        self.queries = 0
        real = holdout.predictions

        def bounded(pipeline: Any, X: Any, *args: Any, **kwargs: Any) -> Any:
            if set(X["depot"]) - self.allowed:
                raise MemoryError  # the simulated bound: the pipeline's memory grows on an unlisted depot
            return real(pipeline, X, *args, **kwargs)

        monkeypatch.setattr(holdout, "predictions", bounded)

    def outside(self, categories: Sequence[str]) -> bool | None:
        self.queries += 1
        self.allowed = set(categories)
        config = config_document(self.dataset, "Ridge", features=["depot", "age", "bmi"], metrics=["rmse"],
                                 preprocess=[{"transformer": "OneHotEncoder", "columns": ["depot"],
                                              "params": {"handle_unknown": "ignore"}}])
        config["model"]["params"] = {"alpha": 1.0 + self.queries}  # a new configuration each time
        sub_id = add_submission(self.ctx, self.dataset, config)
        for f in range(3):
            jobs.run_fold(sub_id, 0, f)
        jobs.summarize(sub_id)
        with contextlib.suppress(MemoryError):  # before: lost work, the submission failed naming the bound
            jobs.score_holdout(sub_id)
        give_verdict(self.ctx, self.redis, sub_id)
        sub = submissions.get(self.ctx.engine, sub_id)
        assert sub is not None
        doc = submission_document(self.ctx.engine, sub)
        holdout_part = (doc.get("result") or {}).get("holdout") or {}
        if doc["failure_cause"] == "memory_limit" or holdout_part.get("note") == FAILED_NOTE:
            return True
        return False if holdout_part.get("released") else None

    def spent(self) -> int:
        rows = holdout_releases.list_since(self.ctx.engine, self.dataset["id"], pd.Timestamp(0).to_pydatetime())
        return sum(int(r["spent"]) for r in rows)


def _bisect(attacker: CrashAttacker) -> str | None:
    left = list(CANDIDATES)
    while len(left) > 1:
        half = left[: len(left) // 2]
        answer = attacker.outside([*KNOWN, *half])
        if answer is None:
            return None
        left = left[len(left) // 2:] if answer else half
    return left[0]


def _rate(name: str, attacker: CrashAttacker) -> float:
    bits, units = math.log2(len(CANDIDATES)), attacker.spent()
    rate = math.inf if units == 0 else bits / units
    print(f"\n[crash attacker] {name}: {bits:g} bits in {attacker.queries} queries for {units} budget units "
          f"-> {rate:g} bits/unit")
    return rate


def _scan(attacker: CrashAttacker) -> str | None:
    """Try each candidate alone beside the known depots; the one that does not crash is the sealed one."""
    for value in CANDIDATES[:-1]:
        answer = attacker.outside([*KNOWN, value])
        if answer is None:
            return None
        if answer is False:
            return value
    return CANDIDATES[-1]


@pytest.mark.parametrize("strategy", [_scan, _bisect], ids=["linear scan", "binary search"])
def test_a_crash_channel_was_cheap_and_now_costs_a_unit_per_bit(
    ctx: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch, strategy: Any
) -> None:
    redis = Redis.from_url(redis_url)
    with monkeypatch.context() as before:
        before.setattr(holdout, "_Attempt", _Unspent)
        old = CrashAttacker(ctx, redis, before)
        assert strategy(old) == SEALED_DEPOT
        # Every crash answer was free: only the answers that released a figure were paid for.
        assert _rate(f"{strategy.__name__[1:]}, before (a bound = lost work)", old) > 1.0
    new = CrashAttacker(ctx, redis, monkeypatch)
    assert strategy(new) == SEALED_DEPOT  # with budget to spare the channel answers: counted, not closed
    assert _rate(f"{strategy.__name__[1:]}, after (a bound past the seal = counted failure)", new) <= 1.0
    assert new.spent() == new.queries
