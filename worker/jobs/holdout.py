"""Score a submission on its dataset's sealed holdout, exactly once.

The model is refitted on every development row, then the sealed partition is opened (its
fingerprint checked) and scored. The job runs beside the fold jobs (it needs nothing they compute)
and only stores its outcome; the verdict job, after the summary, releases a figure or fails the
submission with the stored error. The holdout row's primary key makes the first stored outcome --
a score, or the error of a refit or scoring that failed -- final: a retried or duplicated job
finds it and never scores again. Before refitting, the job claims the computation in the records
(``records.holdout_claims``): of two jobs running at once for one submission (RQ retrying a job it
thought abandoned while the original still runs) one computes, the other waits for the stored outcome,
and takes over only when the holder's heartbeat has stopped; a holder that finds its claim taken over
stops before opening the seal. Nothing here logs, returns or stores holdout rows, ids or
predictions; errors raised while the holdout is in use are replaced by their class name, because
an estimator's message can quote the values it choked on. A failed attempt -- refit, transform or
scoring -- is stored for operators only (``holdout_scores.error``, in the records): whether a pipeline
runs on the sealed rows depends on what they hold, so the verdict job releases that outcome like a
score, as one counted query in fixed words, and the job's own answer says no more than "not scored".
A broken seal is the one outcome that fails the submission at once: it is an incident with the data,
not a verdict on the model, and the configuration may be submitted again.

The attempt is spent the moment the submitted pipeline meets the sealed rows (``holdout_claims.open_seal``).
Whatever ends it after that without an outcome -- the holdout timeout, the memory limit, a crash, a kill
of the work horse (detected by the worker, ``worker.process.main``), a lost worker (detected by the next
job when the claim's heartbeat stops) -- can depend on the sealed rows, so it is stored as the one failed
outcome (``settle_lost``; which bound or signal, for operators only) and released like any failed attempt.
Before that point nothing sealed was touched: a crash is retried and a bound names itself, as for a fold.
"""

from __future__ import annotations

import logging
import os
import time
import warnings
from contextlib import AbstractContextManager
from dataclasses import dataclass
from datetime import timedelta
from typing import Any

from rq.timeouts import JobTimeoutException

from service.errors import SealBroken
from service.gate import timing
from service.ids import new_id
from service.records import datasets, holdout_claims, submissions
from service.submission.resolved import ResolvedConfig
from service.vault import store
from worker.jobs import holdout_deadline, runtime
from worker.jobs.losses import save_per_example, scoring_rows
from worker.jobs.runtime import Skip, WorkerContext, repeating, submission_to_work_on
from worker.learning.development import column_kinds, load_development, model_frame, model_matrix, target_values
from worker.learning.per_row import per_example
from worker.learning.pipeline import build_pipeline, fit_in_place, input_checked, uses_frame
from worker.learning.scoring import class_labels, predictions, score_predictions
from worker.learning.search import build_model, search_keys

log = logging.getLogger(__name__)

# What the records say of a spent attempt that ended without an outcome (operators read the rest).
LOST_AFTER_SEAL = "the holdout step ended without an outcome after the sealed rows were opened"
# A claim without a heartbeat for this long belonged to a job that died; another job may take it over.
CLAIM_STALE_SECONDS = 60.0
HEARTBEAT_SECONDS = 10.0
POLL_SECONDS = 0.5  # how often a job that lost the claim looks for the stored outcome
STORE_SECONDS = 5.0  # kept of the job's timeout for storing the outcome after the deadline


def score_holdout(ctx: WorkerContext, submission_id: str) -> dict[str, Any]:
    """Score the holdout once and store the outcome; a failed or canceled submission is left alone."""
    engine = ctx.engine
    job_started = time.monotonic()
    work = submission_to_work_on(ctx, submission_id)
    if isinstance(work, Skip):
        return work.answer
    sub, dataset = work.submission, work.dataset
    token = new_id("claim")
    claimed = False
    while True:
        if submissions.get_holdout(engine, submission_id) is not None:
            # Scored (or failed) in an earlier or another run; the verdict job finishes the submission.
            return {"submission_id": submission_id, "holdout": "already scored"}
        if claimed:
            break
        stale = timedelta(seconds=CLAIM_STALE_SECONDS)
        claimed = holdout_claims.claim(engine, submission_id, token, stale)
        if not claimed:  # another job computes it: wait for its outcome, or for its heartbeat to stop
            if holdout_claims.spent_and_stale(engine, submission_id, stale):
                # It opened the seal and died without an outcome: the attempt is spent, never repeated.
                return settle_lost(ctx, submission_id, "its job stopped renewing the claim (the work horse or "
                                                       "its worker was lost)")
            late = submission_to_work_on(ctx, submission_id)
            if isinstance(late, Skip):
                return late.answer
            time.sleep(POLL_SECONDS)
    attempt = _Attempt(token, job_started)
    try:
        with _heartbeat(ctx, submission_id, token):
            return _score(ctx, submission_id, sub, dataset, attempt)
    except BaseException as exc:
        if not attempt.opened:
            # Nothing depended on the sealed rows yet: let the retry claim the computation now (rather than
            # after the stale limit), and worker.jobs.failure retry it or fail the submission naming why.
            holdout_claims.release(engine, submission_id, token)
            raise
        # Past the seal, whether and how the step ends can depend on the sealed rows: the attempt is spent
        # and stored as failed (the verdict job releases it as one counted query, in fixed words).
        answer = settle_lost(ctx, submission_id, _ended_by(exc, ctx))
        if not isinstance(exc, Exception):
            raise  # an exit request: honoured, the outcome being stored
        return answer


@dataclass
class _Attempt:
    """The claim this job holds, and whether it has opened the sealed rows (the attempt is then spent)."""

    token: str
    started: float  # time.monotonic() when the job began: the job's timeout counts from there
    opened: bool = False


def settle_lost(ctx: WorkerContext, submission_id: str, how: str) -> dict[str, Any]:
    """Store a spent attempt that ended without an outcome as the submission's one failed holdout outcome.

    ``how`` (which bound, which signal) is for operators: it goes to the records (``holdout_scores.error``)
    and the worker's log; the submitter reads the fixed words every failed attempt gets. A no-op when an
    outcome is stored already, or when no attempt was spent (nothing sealed was touched: RQ's retry
    computes it).
    """
    engine = ctx.engine
    if submissions.get_holdout(engine, submission_id) is not None:
        return {"submission_id": submission_id, "holdout": "already scored"}
    if not holdout_claims.is_spent(engine, submission_id):
        return {"submission_id": submission_id, "holdout": "not started"}
    sub = submissions.get(engine, submission_id)
    dataset = datasets.get_internal(engine, str(sub["dataset_id"])) if sub is not None else None
    if dataset is None:
        return {"submission_id": submission_id, "holdout": "gone"}
    error = f"{LOST_AFTER_SEAL}: {how}"
    log.warning("holdout of %s: %s", submission_id, error)
    return _not_scored(ctx, submission_id, dataset, error)


def _passed(limit: float | None) -> str:
    return f"the step on the sealed rows passed its limit of {limit or 0:.1f} s, fixed from the development rows"


def after_horse_died(ctx: WorkerContext, function: str | None, args: Any, status: Any) -> None:
    """A holdout work horse died (a signal, the OOM killer, a segfault, RQ's kill past the timeout): when it had
    opened the seal, its attempt is spent; store it as failed before RQ retries or fails the job."""
    if not (function or "").endswith(".score_holdout") or not args:
        return
    how = (f"its work horse was killed by signal {os.WTERMSIG(status)}" if status and os.WIFSIGNALED(status)
           else f"its work horse exited with status {status}")
    try:
        settle_lost(ctx, str(args[0]), how)
    except Exception:  # the next attempt settles it from the stale claim
        log.exception("could not store the lost holdout attempt of %s", args[0])


def _ended_by(exc: BaseException, ctx: WorkerContext) -> str:
    """Name, for operators, what ended a spent attempt: a bound, or the exception's class (never its message)."""
    if isinstance(exc, JobTimeoutException):
        return f"the holdout timeout of {ctx.settings.job_timeout_seconds('holdout')} s was reached"
    if isinstance(exc, MemoryError):
        return f"the memory limit of {ctx.settings.memory_limit_mib} MiB was reached"
    return f"{type(exc).__name__} was raised"


def _score(
    ctx: WorkerContext, submission_id: str, sub: dict[str, Any], dataset: dict[str, Any], attempt: _Attempt
) -> dict[str, Any]:
    """Refit on every development row and score the seal; the caller holds the claim as ``attempt.token``."""
    engine = ctx.engine
    config = ResolvedConfig.from_document(sub["config"])
    metrics = config.metrics
    kinds = column_kinds(dataset)
    features = list(config.model.features)

    data, key_frame = load_development(ctx.settings, dataset, features)
    # Scored against the development rows' classes, as the folds are: the holdout adds none.
    classes = class_labels(data.y) if dataset["task"] == "classification" else None
    # A search is refitted on every dev row; a plain pipeline may centre its private copy in place.
    inner = search_keys(config, dataset, key_frame)  # a search's inner folds follow the plan's groups or times
    pipeline = fit_in_place(build_model(build_pipeline(config.model, kinds), config, classes, inner), config.model)
    try:
        started = time.perf_counter()
        with input_checked(pipeline, data.finite):  # the development rows, as the registration checked them
            pipeline.fit(data.copied_features(), data.target_of())
        fit_seconds = time.perf_counter() - started
    except MemoryError:
        raise
    except Exception as exc:  # development rows only: the estimator's message may be shown
        error = f"refitting on all development rows failed: {type(exc).__name__}: {exc}"
        return _not_scored(ctx, submission_id, dataset, error)
    try:  # the sealed step's deadline, fixed from the development rows alone (service.gate.timing)
        dev_seconds = holdout_deadline.dev_predict_seconds(pipeline, data, int(dataset["rows_holdout"]), metrics,
                                                           classes)
    except MemoryError:
        raise
    except Exception as exc:
        error = f"predicting development rows failed: {type(exc).__name__}: {exc}"
        return _not_scored(ctx, submission_id, dataset, error)
    left = ctx.settings.job_timeout_seconds("holdout") - (time.monotonic() - attempt.started) - STORE_SECONDS
    deadline = timing.deadline_seconds(dev_seconds, ctx.settings.holdout_pad_seconds, left)
    prompt = timing.prompt_seconds(dev_seconds, ctx.settings.holdout_prompt_seconds, deadline)

    if not holdout_claims.beat(engine, submission_id, attempt.token):
        # This job stalled past the stale limit and another took the claim over: that one scores.
        return {"submission_id": submission_id, "holdout": "claim lost"}
    # A worker without the shared disk fetches a copy of the sealed file only here, and removes it once read.
    with runtime.sealed_file(str(dataset["id"])) as fetched:
        try:
            holdout = store.open_sealed_holdout(ctx.settings, dataset["id"], dataset["holdout_fingerprint"], fetched)
        except SealBroken:
            raise  # worker.jobs.failure fails the submission (cause "data") and stops its other jobs
    # Reading our own sealed file (fingerprint checked) depends on no configuration; from here on the
    # submitted pipeline meets the sealed rows, so the attempt is spent whatever ends it.
    if holdout_claims.open_seal(engine, submission_id, attempt.token, deadline, prompt) is None:
        return {"submission_id": submission_id, "holdout": "claim lost"}
    attempt.opened = True
    # The step must end half a pad before the deadline, leaving the verdict job time to be given by then.
    limit = timing.step_seconds(deadline, ctx.settings.holdout_pad_seconds)
    with holdout_deadline.watch(lambda: settle_lost(ctx, submission_id, _passed(limit)), limit):
        return _on_the_seal(ctx, submission_id, dataset, pipeline, holdout, features, kinds, metrics, classes,
                            fit_seconds)


def _on_the_seal(
    ctx: WorkerContext, submission_id: str, dataset: dict[str, Any], pipeline: Any, holdout: Any,
    features: list[str], kinds: Any, metrics: Any, classes: Any, fit_seconds: float,
) -> dict[str, Any]:
    """Score the sealed rows with the refitted pipeline and store the outcome (the attempt is spent)."""
    engine = ctx.engine
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # warning texts can quote holdout values
            X = model_frame(holdout, features, kinds) if uses_frame(features, kinds) \
                else model_matrix(holdout, features)
            y = target_values(holdout[dataset["target"]], str(dataset["task"]))
            pred, proba, labels = predictions(pipeline, X, metrics, classes)
            scores, _undefined = score_predictions(y, pred, proba, labels, metrics)
            kept = {m: v for m in metrics if (v := per_example(m, y, pred, proba, labels)) is not None}
            if any(m not in kept for m in metrics):
                # Metrics that are no mean of per-row values: keep what scores them on any subset of
                # rows, for the paired bootstrap of the champion decision (worker/jobs/sealed_champion.py).
                kept.update(scoring_rows(y, pred, proba, labels))
    except (MemoryError, JobTimeoutException):
        raise  # a bound: score_holdout stores the spent attempt as failed, naming the bound for operators
    except Exception as exc:
        error = (f"scoring on the holdout failed with {type(exc).__name__}; its message is withheld because "
                 "it may describe holdout rows (e.g. an unseen category: try handle_unknown='ignore')")
        return _not_scored(ctx, submission_id, dataset, error)
    finally:
        del holdout

    # A metric undefined on the holdout (e.g. roc_auc with one class present) is stored as None.
    if submissions.get_holdout(engine, submission_id) is None:
        # Kept for the parameter-free ladder, inside the sealed directory; written before the score so
        # that a stored score always has them.
        save_per_example(ctx.settings, dataset["id"], submission_id, kept)
    _stored, created = submissions.store_holdout_once(
        engine, submission_id, scores, dataset["holdout_fingerprint"], fit_seconds
    )
    return {"submission_id": submission_id, "holdout": "scored" if created else "already scored",
            "metrics": sorted(scores)}


def _heartbeat(ctx: WorkerContext, submission_id: str, token: str) -> AbstractContextManager[None]:
    """Renew the claim from a thread while the body runs, so a waiting job never takes over a live one."""
    return repeating(HEARTBEAT_SECONDS, lambda: holdout_claims.beat(ctx.engine, submission_id, token),
                     f"holdout-claim-{submission_id}")


def _not_scored(ctx: WorkerContext, submission_id: str, dataset: dict[str, Any], error: str) -> dict[str, Any]:
    """Store a failed attempt as the submission's one holdout outcome; the verdict job releases it as a query.

    The answer (kept by RQ, where anyone with the queue may read it) names no stage and no error.
    """
    submissions.store_holdout_once(ctx.engine, submission_id, {}, dataset["holdout_fingerprint"], None, error=error)
    return {"submission_id": submission_id, "holdout": "not scored"}
