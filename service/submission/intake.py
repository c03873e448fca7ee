"""Accept a submission: resolve its dataset, check its configuration, store it, enqueue its work.

Order matters for "nothing half-written": every check (dataset, fingerprint pin, configuration,
scikit-learn's parameter validation in a worker) runs before the row is inserted, and the jobs are
enqueued only after the row is committed.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, replace
from typing import Any

from redis import Redis
from sqlalchemy import Engine
from sqlalchemy.exc import IntegrityError

from service import team_scope
from service.catalog import load_catalog
from service.catalog.metrics import spec_of
from service.errors import ConfigRejected, Conflict, FieldProblem, Forbidden, InputError, TeamLimitReached
from service.gate.review_state import policy_in_force
from service.ids import new_id
from service.records import audit, submissions
from service.records.keys import KeyInfo
from service.settings import Settings
from service.submission import config, dispatch
from service.submission.fold_warnings import fold_plan_warnings
from service.submission.resolved import ResolvedConfig, ValidationPlan
from service.vocabulary import LIVE_STATES


def find_dataset(engine: Engine, key: KeyInfo, ref: config.DatasetRef) -> dict[str, Any]:
    """Return the internal dataset row a reference names, scoped to the caller's team."""
    row = team_scope.team_dataset(engine, key, ref.id, pointer="/dataset")
    if ref.fingerprint is not None and ref.fingerprint != row["fingerprint"]:
        raise Conflict(
            f"dataset {ref.id} has fingerprint {row['fingerprint']}, not the pinned {ref.fingerprint}",
            [FieldProblem("/dataset/fingerprint", "the pinned fingerprint does not match the dataset")],
        )
    return row


def request_fingerprint(request: config.SubmissionRequest) -> str:
    """Hash a parsed request, to tell an idempotent replay from a different body under the same key."""
    canonical = json.dumps(asdict(request), sort_keys=True, separators=(",", ":"), default=list)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def submit(
    engine: Engine, redis: Redis, settings: Settings, key: KeyInfo, request: config.SubmissionRequest,
    idempotency_key: str | None = None,
) -> tuple[dict[str, Any], bool]:
    """Create a submission and enqueue its jobs; return the row and whether it was created now.

    With an ``idempotency_key``, a replay of the same body returns the first submission; a
    different body under the same key is a 422. A configuration the team already submitted on the
    same data under the same policy version (same configuration key) returns that submission instead
    of a new one, however many identical requests arrive at once: the key is unique in the records,
    so of racing inserts one wins and the others return its row. A submission that was canceled or
    that the infrastructure failed gave its key up, so its configuration runs again.
    """
    fingerprint = request_fingerprint(request)
    if idempotency_key is not None:
        earlier = submissions.find_by_idempotency_key(engine, key.id, idempotency_key)
        if earlier is not None:
            return _replay(earlier, fingerprint), False

    dataset = find_dataset(engine, key, request.dataset)
    catalog = load_catalog()
    resolved = config.resolve(request, dataset, catalog)
    in_force = policy_in_force(engine, dataset)
    primary = in_force["primary_metric"]
    if primary not in resolved.metrics:
        # The verdict is decided on the policy's primary metric, so every submission computes it.
        resolved = replace(resolved, metrics=(*resolved.metrics, primary))
    config_fingerprint = config.config_fingerprint(resolved, dataset["fingerprint"])
    slot = submissions.config_key(key.team, dataset["id"], config_fingerprint, int(in_force["version"]))
    same = submissions.find_by_config(engine, key.team, dataset["id"], config_fingerprint, slot)
    if same is not None:
        # The same model, validation and data were already judged: answer with that submission, so a
        # resubmission recomputes nothing and spends no holdout budget.
        return same, False
    limit = settings.team_max_live_submissions
    if limit and submissions.count_live(engine, key.team) >= limit:
        raise TeamLimitReached(f"team {key.team} has {limit} submissions queued or running, the most a team may "
                               "have at once (SEALFOLD_TEAM_MAX_LIVE); submit again when some have finished")
    check = dispatch.check_config_remote(redis, settings, resolved.to_document(), dataset["id"])
    _check_probability_metrics(resolved, check)
    resolved = replace(resolved, linear=catalog.is_linear(resolved.model.estimator))

    sub_id = new_id("sub")
    validation = resolved.validation
    row = {
        "id": sub_id, "team": key.team, "dataset_id": dataset["id"], "owner_key_id": key.id,
        "label": request.label, "config": resolved.to_document(),
        "config_fingerprint": config_fingerprint, "config_key": slot,
        "folds_total": len(dispatch.fold_cells(validation)),
        "idempotency_key": idempotency_key, "request_fingerprint": fingerprint,
        "warnings": fold_plan_warnings(settings, dataset, validation),
    }
    try:
        submissions.insert(engine, row)
    except IntegrityError:
        # Requests raced under one Idempotency-Key or with one configuration; the first one's row stands.
        if idempotency_key is not None:
            earlier = submissions.find_by_idempotency_key(engine, key.id, idempotency_key)
            if earlier is not None:
                return _replay(earlier, fingerprint), False
        same = submissions.find_by_config(engine, key.team, dataset["id"], config_fingerprint, slot)
        if same is None:
            raise
        return same, False
    dispatch.enqueue_submission(redis, settings, key.team, sub_id, validation,
                                dispatch.champion_to_replay(engine, dataset["id"], validation),
                                together=dispatch.folds_together(settings, int(dataset["rows_development"])))
    stored = submissions.get(engine, sub_id)
    assert stored is not None
    return stored, True


def cancel(engine: Engine, redis: Redis, settings: Settings, key: KeyInfo, sub_id: str) -> dict[str, Any]:
    """Cancel a live submission for its owner or a steward of its team."""
    row = team_scope.team_submission(engine, key, sub_id)
    if row["owner_key_id"] != key.id and not key.can("steward"):
        raise Forbidden("only the submission's owner or a steward of its team may cancel it")
    # A verdict not yet shown reads as running and is canceled like one (service.gate.timing), so a cancel
    # answers alike whether the holdout step still runs or has ended; nothing of the verdict is ever shown.
    states = (*LIVE_STATES, "succeeded") if row.get("held_back") else LIVE_STATES
    if not submissions.transition(engine, sub_id, "canceled", states):
        raise Conflict(f"submission {sub_id} is already {row['state']}; only queued or running ones can be canceled")
    audit.record(engine, key.id, key.team, "submission.canceled", sub_id, {})
    dispatch.cancel_jobs(redis, settings, sub_id, ValidationPlan.from_document(row["config"]["validation"]))
    stored = submissions.get(engine, sub_id)
    assert stored is not None
    return stored


def _replay(earlier: dict[str, Any], fingerprint: str) -> dict[str, Any]:
    if earlier["request_fingerprint"] != fingerprint:
        raise InputError(
            "this Idempotency-Key was already used with a different request body; use a new key",
            [FieldProblem("", "body differs from the first request made with this Idempotency-Key")],
        )
    return earlier


def _check_probability_metrics(resolved: ResolvedConfig, check: dict[str, Any]) -> None:
    if check.get("has_proba", True):
        return
    estimator = resolved.model.estimator
    settings = [str(s) for s in check.get("proba_settings") or []]
    if settings:
        turn_on = f"set {' or '.join(settings)} in model.params to get them"
    else:
        turn_on = f"no parameter of {estimator} gives them: choose a metric computed from labels"
    problems = [
        FieldProblem(f"/metrics/{i}", f"metric {name!r} needs predicted probabilities, which "
                     f"{estimator} with these parameters does not give; {turn_on}")
        for i, name in enumerate(resolved.metrics) if spec_of(name).needs_proba
    ]
    if problems:
        raise ConfigRejected(problems[0].detail, problems)
