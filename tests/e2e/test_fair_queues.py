"""Fair order between teams, end to end: one team's burst does not hold back another team's submission.

A stack of its own (redis-server, API over HTTP, two real forking workers). Both teams register scikit-learn's
diabetes table (Efron et al. 2004). Positions are read from the records DB (the order of ``finished_at``),
never from wall-clock durations.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import select

from service.records.tables import submissions as submissions_table
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import redis_server
from tests.support.stack import Stack, running_stack

BURST = 24


@pytest.fixture
def fair_stack(tmp_path: Path) -> Iterator[Stack]:
    """Two workers, no live-submission cap (the burst is accepted whole), no running cap: round robin alone."""
    with redis_server(tmp_path) as url, running_stack(tmp_path / "data", url, "fair", workers=2,
                                                       settings={"team_max_live_submissions": 0}) as live:
        yield live


def _post(stack: Stack, who: str, dataset_id: str, alpha: float) -> str:
    reply = stack.client(who).post("/v1/submissions", json_body={
        "dataset": dataset_id, "model": {"estimator": "Ridge", "params": {"alpha": alpha}}})
    assert reply.status == 202, reply.text
    return str(reply.json()["id"])


def _post_forest(stack: Stack, who: str, dataset_id: str, seed: int) -> str:
    """A random forest of 50 trees: some 0.1 s a fit, so a burst of them is still queued when it is posted."""
    reply = stack.client(who).post("/v1/submissions", json_body={
        "dataset": dataset_id, "model": {"estimator": "RandomForestRegressor",
                                         "params": {"n_estimators": 50, "random_state": seed}}})
    assert reply.status == 202, reply.text
    return str(reply.json()["id"])


def _rows(stack: Stack, ids: list[str]) -> dict[str, Any]:
    with stack.engine.connect() as conn:
        rows = conn.execute(select(submissions_table.c.id, submissions_table.c.state, submissions_table.c.finished_at)
                            .where(submissions_table.c.id.in_(ids))).mappings().all()
    return {r["id"]: r for r in rows}


def test_a_single_submission_finishes_before_another_teams_burst_drains(fair_stack: Stack) -> None:
    stack = fair_stack
    mine = register(stack.client("steward"), diabetes_frame(), name="fair-a", target="target", task="regression")
    theirs = register(stack.client("other_steward"), diabetes_frame(), name="fair-b", target="target",
                      task="regression")
    stack.wait_for(_post(stack, "other_submitter", theirs["id"], 0.001), who="other_submitter")  # warm caches

    burst = [_post_forest(stack, "submitter", mine["id"], i) for i in range(BURST)]
    waiting = [s for s, row in _rows(stack, burst).items() if row["state"] in ("queued", "running")]
    single = _post(stack, "other_submitter", theirs["id"], 5.0)
    assert len(waiting) >= BURST // 2, "the burst drained while it was posted; the test would test nothing"
    assert stack.wait_for(single, who="other_submitter", timeout=300)["state"] == "succeeded"
    for sub_id in burst:
        assert stack.wait_for(sub_id, timeout=300)["state"] == "succeeded"

    rows = _rows(stack, [*waiting, single])
    after = [s for s in waiting if rows[s]["finished_at"] > rows[single]["finished_at"]]
    # One queue in FIFO order would finish the single submission after every one of the burst's waiting ones;
    # taken in turn, its jobs share the two workers with the burst's, so most of the burst finishes after it.
    assert len(after) >= len(waiting) // 2, (len(after), len(waiting))
