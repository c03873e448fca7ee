"""A scripted submitter who times the holdout step: what the times it reads tell, with the deadline off and on.

Data: scikit-learn's bundled diabetes table (Efron et al. 2004), with a depot column; the sealed rows hold
one depot the development rows lack or not (the secret bit). The attacker's pipeline is taken to be slow on
that depot -- simulated at the boundary: predicting on the sealed rows sleeps when they hold it, standing in
for a transform slow on some values. It reads only the submission document: its ``finished_at`` (measured
here from the moment the seal was opened, which the submitter cannot see: that only makes the attacker
stronger than a real one).

- pad 0 (before): the finished time follows the step, and one submission reads the bit;
- pad 1 s, no prompt time: the finished time is the deadline in both worlds, fixed before the seal was
  opened; a step that would run past it is stopped and told as a failed attempt, shown at the same moment;
- pad 1 s and a prompt time of 0.1 s (the defaults): the fast world is shown at the prompt time, the slow
  world at the deadline -- the attacker reads the bit, and that bit spent one more unit of the budget and
  says so (``late``): counted, like any other answer.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from sklearn.datasets import load_diabetes
from sqlalchemy import select, update

from service import team_scope
from service.gate.release import FAILED_NOTE
from service.gate.review_state import LATE_NOTE
from service.records import audit, holdout_releases, submission_versions, submissions, tables
from service.records.engine import as_utc
from service.records.keys import KeyInfo
from service.records.tables import holdout_claims
from service.settings import Settings
from service.submission import intake
from service.submission.document import document_and_etag, submission_document, version_etag
from tests.support.records import upgraded_engine
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import holdout, runtime
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict

SLOW_DEPOT = "depot-slow"
SLOW_SECONDS = 0.4


def _context(tmp_path: Path, pad: float, prompt: float = 0.0) -> Iterator[WorkerContext]:
    settings = Settings.load({"data_dir": tmp_path, "database_url": "", "holdout_pad_seconds": pad,
                              "holdout_prompt_seconds": prompt}, environ={})
    context = WorkerContext(settings=settings, engine=upgraded_engine(settings))
    runtime.install(context)
    yield context
    runtime.uninstall()
    context.engine.dispose()


@pytest.fixture(params=[(0.0, 0.0), (1.0, 0.0), (1.0, 0.1)], ids=["pad off", "pad 1 s", "pad 1 s, prompt 0.1 s"])
def padded(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[WorkerContext]:
    yield from _context(tmp_path, *request.param)


@pytest.fixture
def padded_1s(tmp_path: Path) -> Iterator[WorkerContext]:
    """The deadline alone (no prompt time): every verdict that read the holdout is shown at it."""
    yield from _context(tmp_path, 1.0)


def _slow_on_the_depot(monkeypatch: pytest.MonkeyPatch, ctx: WorkerContext, seconds: float) -> None:
    """Predicting on sealed rows that hold the depot takes ``seconds``; it stops when an outcome is stored
    meanwhile, as the work horse is stopped at the step's limit."""
    real = holdout.predictions

    def slow(pipeline: Any, X: Any, *args: Any, **kwargs: Any) -> Any:
        if SLOW_DEPOT in set(X["depot"]):
            until = time.monotonic() + seconds
            while time.monotonic() < until:
                time.sleep(0.02)
                if ctx.settings.holdout_pad_seconds and submissions.get_holdout(ctx.engine, _current[0]):
                    raise SystemExit("stopped at the step's limit")  # what killing the horse amounts to
        return real(pipeline, X, *args, **kwargs)

    monkeypatch.setattr(holdout, "predictions", slow)


_current: list[str] = [""]


@dataclass(frozen=True)
class Seen:
    """What one submission showed its submitter, and what it cost."""

    seconds: float  # from the seal's opening to the finished time it reads
    note: str | None  # the holdout part's note
    late: bool  # the holdout part says the verdict came late
    summary: str  # the holdout part's plain sentence
    spent: int  # units of the budget its release spent


def _observe(ctx: WorkerContext, redis_url: str, sealed_slow: bool) -> Seen:
    """One submission, polled as its submitter would until its verdict is shown."""
    frame = load_diabetes(as_frame=True).frame
    frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
    dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
    if sealed_slow:
        hold.loc[hold.index[0], "depot"] = SLOW_DEPOT
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    config = config_document(dataset, "Ridge", features=["depot", "age", "bmi"], metrics=["rmse"],
                             preprocess=[{"transformer": "OneHotEncoder", "columns": ["depot"],
                                          "params": {"handle_unknown": "ignore"}}])
    sub_id = add_submission(ctx, dataset, config)
    _current[0] = sub_id
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    with contextlib.suppress(SystemExit):  # the stopped step: its outcome is stored
        jobs.score_holdout(sub_id)
    give_verdict(ctx, Redis.from_url(redis_url), sub_id)
    deadline = time.monotonic() + 10
    while True:  # the submitter polls until the verdict is shown
        sub = submissions.get(ctx.engine, sub_id)
        assert sub is not None
        doc = submission_document(ctx.engine, sub)
        if doc["state"] == "succeeded":
            break
        assert time.monotonic() < deadline, doc["state"]
        time.sleep(0.05)
    with ctx.engine.connect() as conn:
        opened = as_utc(conn.execute(select(holdout_claims.c.opened_at)
                                     .where(holdout_claims.c.submission_id == sub_id)).scalar_one())
    assert opened is not None
    finished = datetime.fromisoformat(doc["finished_at"])
    told = holdout_releases.get(ctx.engine, sub_id)
    assert told is not None
    part = doc["result"]["holdout"]
    return Seen((finished - opened).total_seconds(), part["note"], part["late"], part["summary"], int(told["spent"]))


def test_the_finished_time_tells_the_step_duration_only_without_a_deadline(
    padded: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    ctx = padded
    _slow_on_the_depot(monkeypatch, ctx, SLOW_SECONDS)
    fast = _observe(ctx, redis_url, sealed_slow=False)
    slow = _observe(ctx, redis_url, sealed_slow=True)
    gap = slow.seconds - fast.seconds
    pad, prompt = ctx.settings.holdout_pad_seconds, ctx.settings.holdout_prompt_seconds
    # One submission per world, a threshold halfway: the bit is read when the gap exceeds the jitter of a
    # few tens of milliseconds that the rest of the step adds (the attacker sees the seal's opening here).
    bits = 1.0 if gap > SLOW_SECONDS / 2 else 0.0
    counted = slow.spent - fast.spent  # what reading it cost, beyond the answer both worlds paid for
    print(f"\n[timing attacker] pad {pad:g} s, prompt {prompt:g} s: finished {fast.seconds:.3f} s after the seal "
          f"opened (fast world), {slow.seconds:.3f} s (slow world) -> {bits:g} bit per submission, "
          f"{counted} more unit(s) counted for it")
    assert not fast.late
    if pad == 0:
        assert bits == 1.0 and counted == 0 and not slow.late  # read for free
    elif prompt == 0:
        assert slow.seconds == fast.seconds  # both shown at the deadline, fixed before the seal was opened
        assert bits == 0.0 and counted == 0
    else:
        assert fast.seconds < 0.5  # the prompt time: twice a few ms + 0.1 s
        assert slow.seconds >= 1.0  # the deadline, as with no prompt time
        assert bits == 1.0 and counted == 1 and slow.late  # read, and counted as one more query
        assert slow.summary.endswith(LATE_NOTE) and not fast.summary.endswith(LATE_NOTE)  # and told so


def test_a_step_past_its_limit_is_a_failed_attempt_shown_at_the_deadline(
    padded_1s: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    ctx = padded_1s
    _slow_on_the_depot(monkeypatch, ctx, 30.0)  # far past the step's limit (1.5 s for a 2 s deadline)
    fast = _observe(ctx, redis_url, sealed_slow=False)
    slow = _observe(ctx, redis_url, sealed_slow=True)
    assert fast.note != FAILED_NOTE and slow.note == FAILED_NOTE  # the counted answer says it failed
    assert fast.seconds == slow.seconds  # and the moment it is shown says nothing more
    stored = submissions.get_holdout(ctx.engine, _current[0])
    assert stored is not None and "passed its limit" in stored["error"]


def _cross_validated(ctx: WorkerContext) -> tuple[dict[str, Any], str]:
    """A diabetes Ridge submission whose 3 folds and summary are done, its holdout step not yet begun."""
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", metrics=["rmse"]))
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    return dataset, sub_id


def _etags(ctx: WorkerContext, sub_id: str) -> str:
    """The submission's ETag as the poll path reads it and as the built document carries it; they agree."""
    version = submission_versions.get(ctx.engine, sub_id)
    assert version is not None
    built = document_and_etag(ctx.engine, submissions.get(ctx.engine, sub_id) or {})[1]
    assert version_etag(version) == built
    return built


def test_before_publication_every_reading_shows_the_submission_running(
    padded_1s: WorkerContext, redis_url: str
) -> None:
    ctx = padded_1s
    dataset, sub_id = _cross_validated(ctx)
    etag = _etags(ctx, sub_id)
    jobs.score_holdout(sub_id)
    active = submissions.last_activity(ctx.engine, "fleet")
    give_verdict(ctx, Redis.from_url(redis_url), sub_id)
    assert submissions.last_activity(ctx.engine, "fleet") == active  # the desk's "last activity" did not move
    # A poller's ETag did not move either, by the cheap version read or by the built document: the holdout
    # step and the held-back verdict are not a change it can see (a 304 still answers it).
    assert _etags(ctx, sub_id) == etag
    caller = KeyInfo(id="key_test", team="fleet", role="submitter", name="t", identity="key_test")
    row = team_scope.team_submission(ctx.engine, caller, sub_id)
    doc = submission_document(ctx.engine, submissions.get(ctx.engine, sub_id) or {})
    assert row["held_back"] and row["verdict"] is None and row["state"] == "running"
    assert doc["state"] == "running" and doc["finished_at"] is None and doc["result"]["verdict"] is None
    assert doc["result"]["holdout"]["released"] is False and doc["result"]["holdout"]["mode"] is None
    assert submissions.count_by_state(ctx.engine).get("succeeded", 0) == 0
    team_events = [e["action"] for e in audit.recent_for_team(ctx.engine, "fleet")]
    assert not [a for a in team_events if a.startswith("holdout.")], team_events
    until = time.monotonic() + 10  # the deadline: 4 x a few ms + the 1 s pad, on the 1 s grid: some 2 s
    while doc["state"] == "running":
        assert time.monotonic() < until
        time.sleep(0.05)
        doc = submission_document(ctx.engine, submissions.get(ctx.engine, sub_id) or {})
    assert doc["state"] == "succeeded" and doc["result"]["verdict"] is not None
    assert _etags(ctx, sub_id) != etag  # published: a change every poller sees
    released = [e for e in audit.recent_for_team(ctx.engine, "fleet") if e["action"] == "holdout.released"]
    assert [e["at"] for e in released] == [doc["finished_at"]]
    moved = as_utc(submissions.last_activity(ctx.engine, "fleet")[dataset["id"]])
    assert moved is not None and moved == as_utc(datetime.fromisoformat(doc["finished_at"]))
    assert [e["action"] for e in audit.recent_for_team(ctx.engine, "fleet")].count("holdout.scored") == 0
    assert [e["action"] for e in audit.events_for(ctx.engine, sub_id)].count("holdout.scored") == 1  # operators'


def test_a_cancel_before_publication_answers_as_for_a_running_submission(
    padded_1s: WorkerContext, redis_url: str
) -> None:
    ctx = padded_1s
    _, sub_id = _cross_validated(ctx)
    jobs.score_holdout(sub_id)
    give_verdict(ctx, Redis.from_url(redis_url), sub_id)  # judged, not yet shown
    owner = KeyInfo(id="key_test", team="fleet", role="submitter", name="t", identity="key_test")
    stored = intake.cancel(ctx.engine, Redis.from_url(redis_url), ctx.settings, owner, sub_id)
    assert stored["state"] == "canceled"
    time.sleep(2.5)  # past the deadline: still nothing of the verdict
    doc = submission_document(ctx.engine, submissions.get(ctx.engine, sub_id) or {})
    assert doc["state"] == "canceled" and doc["result"]["verdict"] is None
    assert doc["result"]["holdout"]["released"] is False and doc["result"]["holdout"]["mode"] is None


def test_between_the_verdict_jobs_writes_the_answer_is_held_back(
    padded_1s: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The verdict job records the release, stores the verdict, then moves the state, in three transactions: a
    # reader in between must already find them held back (an end-to-end poll once caught the verdict shown
    # on a running submission, 2 s before its deadline).
    ctx = padded_1s
    _, sub_id = _cross_validated(ctx)
    jobs.score_holdout(sub_id)
    between: list[dict[str, Any]] = []
    transition = submissions.transition

    def reading_first(engine: Any, sid: str, state: str, *args: Any, **kwargs: Any) -> bool:
        if state == "succeeded":
            between.append(submission_document(ctx.engine, submissions.get(ctx.engine, sid) or {}))
        return transition(engine, sid, state, *args, **kwargs)

    store_verdict = submissions.store_verdict

    def reading_before_the_verdict(engine: Any, sid: str, *args: Any, **kwargs: Any) -> None:
        # The release row is written by now: its figure must not show before the publication either.
        between.append(submission_document(ctx.engine, submissions.get(ctx.engine, sid) or {}))
        store_verdict(engine, sid, *args, **kwargs)

    monkeypatch.setattr(submissions, "transition", reading_first)
    monkeypatch.setattr(submissions, "store_verdict", reading_before_the_verdict)
    give_verdict(ctx, Redis.from_url(redis_url), sub_id)
    assert holdout_releases.get(ctx.engine, sub_id) is not None and len(between) == 2
    for doc in between:
        assert doc["state"] == "running" and doc["finished_at"] is None and doc["result"]["verdict"] is None
        assert doc["result"]["holdout"]["released"] is False and doc["result"]["holdout"]["mode"] is None
    # A retried verdict job finishes it at the stored publication time, not at the retry's.
    stored = submissions.get(ctx.engine, sub_id)
    assert stored is not None and stored["published_at"] is not None
    with ctx.engine.begin() as conn:  # as if the job died between its two writes
        conn.execute(update(tables.submissions).where(tables.submissions.c.id == sub_id)
                     .values(state="running", finished_at=None))
    assert give_verdict(ctx, Redis.from_url(redis_url), sub_id)["verdict"] == "already judged"
    again = submissions.get(ctx.engine, sub_id)
    assert again is not None and again["state"] == "succeeded"
    assert as_utc(again["finished_at"]) == as_utc(stored["published_at"]) > as_utc(datetime.now(UTC))
