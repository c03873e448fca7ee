"""Through real workers and HTTP, the verdict is shown at the deadline fixed before the seal was opened.

Real stack (own redis-server, two real forking workers, SQLite records), with the holdout pad on (2 s),
without and with a prompt time (0.1 s).
Data: scikit-learn's bundled diabetes table (Efron et al. 2004). What the submitter reads by polling --
the state, the finished time, the verdict history's time -- is the deadline or the prompt time, or a time
the summary set, never the moment the step on the sealed rows ended; a late answer is counted.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import select

from service.records import holdout_releases, submissions
from service.records.engine import as_utc
from service.records.tables import holdout_claims
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import redis_server
from tests.support.stack import Stack, running_stack

pytestmark = pytest.mark.slow


PROMPT_PAD = 0.1


@pytest.fixture(params=[0.0, PROMPT_PAD], ids=["deadline alone", "prompt time"])
def padded_stack(tmp_path: Path, request: pytest.FixtureRequest) -> Iterator[Stack]:
    with redis_server(tmp_path) as url, running_stack(
        tmp_path / "data", url, "timing", workers=2,
        settings={"holdout_pad_seconds": 2.0, "holdout_prompt_seconds": request.param},
    ) as live:
        yield live


def _judged(stack: Stack) -> tuple[str, dict[str, Any], bool]:
    """POST a diabetes Ridge submission and poll it, as its submitter, until it is shown succeeded; return its
    id, the document shown, and whether it was seen running after its verdict was stored (held back)."""
    ds = register(stack.client("steward"), diabetes_frame(), name="timed", target="target", task="regression")
    reply = stack.client().post("/v1/submissions", json_body={"dataset": ds["id"], "model": {"estimator": "Ridge"}})
    assert reply.status == 202, reply.text
    sub_id = str(reply.json()["id"])
    client = stack.client()
    deadline = time.monotonic() + 120
    seen_running_after_scoring = False
    while True:
        doc = client.get(f"/v1/submissions/{sub_id}").json()
        if doc["state"] == "succeeded":
            break
        assert doc["state"] in ("queued", "running"), doc
        assert doc["result"] is None or doc["result"]["verdict"] is None
        if submissions.get(stack.engine, sub_id)["verdict"] is not None:  # type: ignore[index]
            # Judged in the records: the history read now must be empty if the submission still reads as
            # running after it (read in that order, so a publication in between is not taken for a leak).
            history = client.get(f"/v1/submissions/{sub_id}/verdicts").json()["history"]
            if client.get(f"/v1/submissions/{sub_id}").json()["state"] == "running":
                seen_running_after_scoring = True
                assert history == []
        assert time.monotonic() < deadline, stack.log_path.read_text(errors="replace")[-3000:]
        time.sleep(0.05)
    return sub_id, doc, seen_running_after_scoring


def test_the_verdict_is_shown_at_a_time_fixed_in_advance_and_every_time_read_is_it(padded_stack: Stack) -> None:
    stack = padded_stack
    sub_id, doc, seen_held = _judged(stack)
    client = stack.client()
    with stack.engine.connect() as conn:
        claim = conn.execute(select(holdout_claims).where(holdout_claims.c.submission_id == sub_id)).mappings().one()
    stored = submissions.get_holdout(stack.engine, sub_id)
    row = submissions.get(stack.engine, sub_id)
    told = holdout_releases.get(stack.engine, sub_id)
    assert stored is not None and stored["error"] is None and row is not None and told is not None
    opened, fixed = as_utc(claim["opened_at"]), as_utc(claim["deadline_at"])
    prompt, summarized = as_utc(claim["prompt_at"]), as_utc(row["summarized_at"])
    scored = as_utc(stored["scored_at"])
    assert opened is not None and fixed is not None and scored is not None and summarized is not None
    assert scored < fixed  # the step ended well before its deadline ...
    finished = datetime.fromisoformat(doc["finished_at"])
    history = client.get(f"/v1/submissions/{sub_id}/verdicts").json()["history"]
    assert [datetime.fromisoformat(h["judged_at"]) for h in history] == [finished]
    late = doc["result"]["holdout"]["late"]
    assert told["spent"] == 1 + int(late)  # a late answer is one more query
    if prompt is None or late:
        # ... and what is read is the deadline (or, were the verdict later, a grid step after it), never the end.
        assert finished >= fixed and (finished - fixed).total_seconds() % 2.0 == pytest.approx(0.0, abs=1e-3)
        assert seen_held or finished > fixed  # the hold was seen (about 2 s here, less if late)
        assert late == (prompt is not None)
        if late:
            assert scored > summarized  # only a verdict that waited on the sealed step is ever late
    elif finished == prompt:
        assert prompt - opened < fixed - opened  # shown at the prompt time, whatever the step took
    else:
        # Later than the prompt time, not late: the verdict waited on the summary, stored after the outcome,
        # and is shown half a prompt pad after it was given.
        assert summarized > scored and finished > prompt
        assert (finished - summarized).total_seconds() >= PROMPT_PAD / 2
    print(f"\n[timing e2e] prompt {prompt is not None}: shown {(finished - opened).total_seconds():.3f} s after "
          f"the seal opened, late {late}")
