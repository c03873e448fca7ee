"""Scripted adaptive submitters against the sealed partition: how many bits per unit of budget they get.

Two attackers, each only reading what a submitter reads (the submission document) and paying what the
records say it spent:

- values: the sealed rows hold one depot that the development rows lack, one of 16 candidates. The
  attacker sends OneHotEncoder configurations with an explicit category list (handle_unknown='error'):
  such a pipeline fails on the holdout exactly when the sealed rows hold a depot outside the list. A
  linear scan and a binary search both identify the depot (log2 16 = 4 bits).
- membership: is a known row (with a depot nobody else has) in the sealed partition? One configuration
  refusing unknown depots answers it (1 bit).

When a failure was free, the scan learned 4 bits for at most one unit. Now every outcome is one query,
so no attacker gets more than one bit per unit, and once the budget is spent it learns nothing at all.
Run with ``-s`` to see the figures.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pandas as pd
from redis import Redis
from sklearn.datasets import load_diabetes

from service.records import holdout_releases, policies, submissions
from service.submission.document import submission_document
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict

CANDIDATES = [f"depot-{i:02d}" for i in range(16)]
SEALED_DEPOT = "depot-11"
KNOWN = ["north", "south"]


def _dataset(ctx: WorkerContext, sealed_value: str | None, budget: int) -> dict[str, Any]:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn) with a depot column; the holdout's first row
    holds ``sealed_value`` when given."""
    frame = load_diabetes(as_frame=True).frame
    frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
    dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
    if sealed_value is not None:
        hold.loc[hold.index[0], "depot"] = sealed_value
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "ladder", "budget": budget}}, "key_steward")
    return dataset


class Attacker:
    """Sends configurations, reads only the submission document, and tallies what the records say it spent."""

    def __init__(self, ctx: WorkerContext, redis: Redis, dataset: dict[str, Any]) -> None:
        self.ctx, self.redis, self.dataset = ctx, redis, dataset
        self.queries = 0

    def holdout_rejects_outside(self, categories: Sequence[str]) -> bool | None:
        """Ask whether the sealed rows hold a depot outside ``categories``; None when the answer is withheld."""
        self.queries += 1
        config = config_document(self.dataset, "Ridge", features=["depot", "age", "bmi"], metrics=["rmse"],
                                 preprocess=[{"transformer": "OneHotEncoder", "columns": ["depot"],
                                              "params": {"categories": [list(categories)],
                                                         "handle_unknown": "error"}}])
        sub_id = add_submission(self.ctx, self.dataset, config)
        for f in range(3):
            jobs.run_fold(sub_id, 0, f)
        jobs.summarize(sub_id)
        jobs.score_holdout(sub_id)
        give_verdict(self.ctx, self.redis, sub_id)
        sub = submissions.get(self.ctx.engine, sub_id)
        assert sub is not None
        doc = submission_document(self.ctx.engine, sub)
        holdout = (doc.get("result") or {}).get("holdout") or {}
        if doc["state"] == "failed" or "did not produce a figure" in str(holdout.get("note")):
            return True
        if holdout.get("released"):
            return False
        return None

    def spent(self) -> int:
        rows = holdout_releases.list_since(self.ctx.engine, self.dataset["id"], pd.Timestamp(0).to_pydatetime())
        return sum(int(r["spent"]) for r in rows)


def _scan(attacker: Attacker) -> str | None:
    """Try each candidate alone beside the known depots; the one the holdout accepts is the sealed one."""
    for i, value in enumerate(CANDIDATES):
        answer = attacker.holdout_rejects_outside([*KNOWN, value])
        if answer is False:
            return value
        if answer is None:
            return None
        if i == len(CANDIDATES) - 2:  # every other candidate refused: the last one it is, without asking
            return CANDIDATES[-1]
    return None


def _bisect(attacker: Attacker) -> str | None:
    left = list(CANDIDATES)
    while len(left) > 1:
        half = left[: len(left) // 2]
        answer = attacker.holdout_rejects_outside([*KNOWN, *half])
        if answer is None:
            return None
        left = left[len(left) // 2:] if answer else half
    return left[0]


def _report(name: str, bits: float, units: int, queries: int) -> float:
    rate = math.inf if units == 0 else bits / units
    print(f"\n[attacker] {name}: {bits:g} bits in {queries} queries for {units} budget units -> {rate:g} bits/unit")
    return rate


def _values_attack(ctx: WorkerContext, redis_url: str, strategy: Callable[[Attacker], str | None],
                   name: str) -> None:
    attacker = Attacker(ctx, Redis.from_url(redis_url), _dataset(ctx, SEALED_DEPOT, budget=20))
    guess = strategy(attacker)
    assert guess == SEALED_DEPOT  # with budget to spare, the channel answers: it is counted, not closed
    rate = _report(name, math.log2(len(CANDIDATES)), attacker.spent(), attacker.queries)
    assert rate <= 1.0


def test_scanning_for_a_sealed_value_costs_a_unit_per_bit(ctx: WorkerContext, redis_url: str) -> None:
    _values_attack(ctx, redis_url, _scan, "values, linear scan")


def test_bisecting_for_a_sealed_value_costs_a_unit_per_bit(ctx: WorkerContext, redis_url: str) -> None:
    _values_attack(ctx, redis_url, _bisect, "values, binary search")


def test_whether_a_row_is_sealed_costs_a_unit_and_nothing_once_the_budget_is_spent(
    ctx: WorkerContext, redis_url: str
) -> None:
    redis = Redis.from_url(redis_url)
    answers, units = [], []
    for sealed in (True, False):  # the known row (depot "rare-7") is sealed, or not in the table at all
        attacker = Attacker(ctx, redis, _dataset(ctx, "rare-7" if sealed else None, budget=1))
        answers.append(attacker.holdout_rejects_outside(KNOWN))
        units.append(attacker.spent())
        # The budget is spent: asking again, whatever the truth, is answered by nothing.
        assert attacker.holdout_rejects_outside([*KNOWN, "depot-00"]) is None
        assert attacker.holdout_rejects_outside(KNOWN[::-1]) is None
        assert attacker.spent() == 1
    assert answers == [True, False] and units == [1, 1]
    _report("membership, sealed row", 1.0, units[0], 3)
    _report("membership, absent row", 1.0, units[1], 3)


def test_the_consistency_rule_tells_nothing_once_the_figure_is_withheld(ctx: WorkerContext, redis_url: str) -> None:
    # The holdout-consistency rule's pass/fail is a bit about the sealed rows. An attacker whose budget
    # is spent keeps submitting, hoping to read it from the verdict: each answer it sees is a bit for free.
    redis = Redis.from_url(redis_url)
    shown = 0
    for mode in ("exact", "ladder"):
        dataset = _dataset(ctx, None, budget=1)
        policies.put(ctx.engine, dataset["id"], {"release": {"mode": mode, "budget": 1}}, "key_steward")
        attacker = Attacker(ctx, redis, dataset)
        for alpha in (0.1, 1.0, 10.0, 100.0):
            config = config_document(dataset, "Ridge", params={"alpha": alpha}, features=["age", "bmi", "bp"],
                                     metrics=["rmse"])
            sub_id = add_submission(ctx, dataset, config)
            for f in range(3):
                jobs.run_fold(sub_id, 0, f)
            jobs.summarize(sub_id)
            jobs.score_holdout(sub_id)
            give_verdict(ctx, redis, sub_id)
            verdict = submissions.get(ctx.engine, sub_id)["verdict"]  # type: ignore[index]
            rule = next(r for r in verdict["rules"] if r["rule"] == "holdout_gap")
            shown += rule["outcome"] in ("pass", "fail")
        free = shown - (1 if mode == "exact" else 0)
        _report(f"consistency rule, {mode}, budget 1, 4 submissions: {max(free, 0)} free bits", shown,
                attacker.spent(), 4)
        assert attacker.spent() == 1
        # exact: shown once, with the released figure it is a function of; ladder: never (no own figure).
        assert shown == (1 if mode == "exact" else 0)
        shown = 0
