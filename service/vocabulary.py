"""The fixed words of sealfold, each list defined once: tasks, submission states, roles, release modes, decisions.

Request schemas (marshmallow ``OneOf``), the records, policy parsing, the command line and the worker
all import these lists, so a word is accepted or refused the same way everywhere.
"""

from __future__ import annotations

TASKS: tuple[str, ...] = ("regression", "classification")

# A submission is live until it reaches a terminal state; nothing moves it out of one.
LIVE_STATES: tuple[str, ...] = ("queued", "running")
TERMINAL_STATES: tuple[str, ...] = ("succeeded", "failed", "canceled")
STATES: tuple[str, ...] = LIVE_STATES + TERMINAL_STATES

# Why a failed submission failed. "model": the estimator's own error on every fold -- the result of the
# submission. The others are work that did not happen, so no verdict is given on what remains:
# "timeout" and "memory_limit" (a bound was exceeded; deterministic, never retried), "missing_data" (the
# dataset's files could not be read, on every worker that tried) and "crash" (a job died or was lost,
# retries included). "data" is the sealed holdout failing its fingerprint check.
FAILURE_CAUSES: tuple[str, ...] = ("model", "timeout", "memory_limit", "missing_data", "crash", "data")
# Causes that are no fault of the configuration: its key is given up, so sending it again runs it again.
# (A timeout or a memory limit would be met again by the same configuration: those keep the key.)
INFRASTRUCTURE_CAUSES: tuple[str, ...] = ("missing_data", "crash", "data")

ROLES: tuple[str, ...] = ("submitter", "steward", "admin")  # each role can do what the ones before it can

# How a submission's holdout score is released to its submitter.
RELEASE_MODES: tuple[str, ...] = ("exact", "ladder", "thresholdout")
# What a released holdout figure is, per mode in that order: the submission's own score (rounded), the
# dataset's best so far (which a submission that did not move the ladder does not hold), thresholdout's answer.
HOLDOUT_FIGURES: tuple[str, ...] = ("own_score", "dataset_best_so_far", "thresholdout_answer")

# A verdict's decision; each rule of a verdict has one of these outcomes, or "skipped" when it does not apply.
DECISIONS: tuple[str, ...] = ("pass", "fail", "inconclusive")
RULE_OUTCOMES: tuple[str, ...] = (*DECISIONS, "skipped")
