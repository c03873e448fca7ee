"""Schemas of the review-gate surface: policy, champion, board (documentation; the core checks the bodies).

The policy body is judged by ``service.gate.policy.parse_policy`` (one place for its rules, with JSON
pointers in its errors); these schemas describe it for the OpenAPI document and check nothing.
"""

from __future__ import annotations

from marshmallow import EXCLUDE, Schema, fields, validate

from service.api.submission_schemas import LadderReadingSchema
from service.gate.online import ONLINE_PROCEDURES
from service.vocabulary import DECISIONS, HOLDOUT_FIGURES, RELEASE_MODES

_DATETIME = {"format": "date-time"}
# OpenAPI 3.0 bounds: exclusiveMinimum/exclusiveMaximum are booleans beside minimum/maximum.
_POSITIVE = {"minimum": 0, "exclusiveMinimum": True}
_LEVEL = {**_POSITIVE, "maximum": 0.5, "exclusiveMaximum": True}


class HoldoutGapSchema(Schema):
    k_std = fields.Float(metadata={"description": "sets the nominal false-fail rate 2 * (1 - Phi(k_std)) of the "
                                                  "t prediction interval (default 3: 0.27 %)"})
    floor = fields.Float(metadata={"minimum": 0, "description": "added to the gap, in the metric's units"})
    false_fail_rate = fields.Float(metadata={**_POSITIVE, "maximum": 0.5, "description": (
        "the chance that a sound model's holdout falls outside the interval; may be given instead of k_std "
        "(both given must agree)")})


class ThresholdoutSchema(Schema):
    threshold = fields.Float(metadata=_POSITIVE)
    sigma = fields.Float(metadata=_POSITIVE)
    budget = fields.Integer(metadata={"minimum": 1})


class ReleaseSchema(Schema):
    mode = fields.String(metadata={"enum": list(RELEASE_MODES)})
    digits = fields.Integer(metadata={"description": "exact mode: digits the score is rounded to"})
    budget = fields.Integer(metadata={"description": "holdout queries per submitter (a person or CI identity, "
                                                    "whatever its keys) per dataset per window"})
    window_hours = fields.Float()
    team_budget = fields.Integer(allow_none=True, metadata={
        "minimum": 1, "description": "holdout queries per team per dataset per window; null: three times budget"})
    ladder_step = fields.Float(allow_none=True, metadata={"description": "null: the parameter-free ladder"})
    ladder_threshold_se = fields.Float(metadata={
        "exclusiveMinimum": True, "minimum": 0, "maximum": 10,
        "description": "parameter-free ladder: the threshold in standard errors of the per-row differences "
                       "from the best (default 2, measured in bench/ladder_adaptive.py)"})
    ladder_shrink_se = fields.Float(metadata={
        "minimum": 0, "maximum": 10,
        "description": "parameter-free ladder: a new best after the first is released as its score less this many "
                       "standard errors of its gain over the previous best; smaller than ladder_threshold_se "
                       "(default 1, measured in bench/ladder_adaptive.py)"})
    thresholdout = fields.Nested(ThresholdoutSchema, allow_none=True, metadata={
        "description": "null: none (the default for metrics in the target's units, which have no default)"})


class PolicyBodySchema(Schema):
    """A dataset's review policy as a steward sends it (the server assigns the version)."""

    primary_metric = fields.String(metadata={"example": "rmse", "description": "see GET /v1/catalog"})
    greater_is_better = fields.Boolean(metadata={"description": "must match the metric's direction"})
    bar = fields.Float(allow_none=True, metadata={"description": "absolute bar on the CV mean; null: none"})
    baseline_alpha = fields.Float(metadata={**_LEVEL,
                                            "description": "level of the one-sided test against the baseline"})
    champion_margin = fields.Float(metadata={"minimum": 0, "description": "non-inferiority margin, in the "
                                                                          "metric's units"})
    champion_alpha = fields.Float(metadata=_LEVEL)
    holdout_gap = fields.Nested(HoldoutGapSchema, metadata={
        "description": "|holdout - CV mean| <= t_{J-1} * fold std * sqrt(1/J + n_test/n_train + "
                       "n_test/n_holdout) + floor, at the nominal false_fail_rate"})
    max_fold_std = fields.Float(allow_none=True, metadata={"description": "limit on the fold spread; null: none"})
    release = fields.Nested(ReleaseSchema)
    champion_rule = fields.String(metadata={
        "enum": ["cv", "holdout", "both"],
        "description": "which champion comparison decides: on the shared folds (cv), on the sealed rows "
                       "(holdout, one more holdout query paid from the release budget) or both"})
    champion_online = fields.String(metadata={
        "enum": list(ONLINE_PROCEDURES),
        "description": "error control across the dataset's stream of champion decisions on the sealed rows: "
                       "LORD++ levels (false discovery rate, independent tests), alpha-spending (alpha * gamma_t: "
                       "the chance of any false pass at most champion_alpha under any dependence), or every test "
                       "at champion_alpha"})


class PolicySchema(PolicyBodySchema):
    """The policy in force; version 0 is the task's default, never stored."""

    version = fields.Integer(metadata={"minimum": 0})


class ChampionRequestSchema(Schema):
    submission = fields.String(required=True, validate=validate.Length(min=1, max=40),
                               metadata={"example": "sub_0123456789abcdef0123"})


class PromotionSchema(Schema):
    submission = fields.String()
    promoted_by = fields.String(metadata={"description": "key id of the steward"})
    promoted_at = fields.String(metadata=_DATETIME)


class ChampionSchema(PromotionSchema):
    label = fields.String()
    verdict = fields.String(allow_none=True, validate=validate.OneOf(DECISIONS))


class ChampionStateSchema(Schema):
    """The champion in force (null: none yet) and every promotion, newest first."""

    dataset = fields.String()
    champion = fields.Nested(ChampionSchema, allow_none=True)
    history = fields.List(fields.Nested(PromotionSchema))


class BoardQuerySchema(Schema):
    class Meta:
        unknown = EXCLUDE

    limit = fields.Integer(load_default=50, validate=validate.Range(1, 200))
    cursor = fields.String(load_default=None, metadata={"description": "next_cursor of the previous page"})


class BoardCvSchema(Schema):
    mean = fields.Float()
    std = fields.Float(allow_none=True)
    n = fields.Integer(allow_none=True, metadata={"description": "folds with a score"})
    naive_interval_95 = fields.List(fields.Float(), allow_none=True, metadata={
        "description": "treats folds as independent, which they are not: read it as too narrow; its ends "
                       "are clipped to the metric's range (the catalog's bounds)"})
    clipped = fields.Boolean(allow_none=True, metadata={
        "description": "an end of naive_interval_95 lay outside the metric's range and was moved to its edge"})


class ReleasedUnderSchema(Schema):
    mode = fields.String(validate=validate.OneOf(RELEASE_MODES))
    policy_version = fields.Integer(allow_none=True)


class BoardHoldoutSchema(Schema):
    """Only what the release policy released; never the raw holdout score."""

    released = fields.Boolean()
    mode = fields.String(allow_none=True)
    score = fields.Float(allow_none=True, metadata={
        "description": "the primary metric, as released; under the ladder the dataset's best so far, not this row's"})
    withheld_until = fields.String(allow_none=True, metadata=_DATETIME)
    policy_version = fields.Integer(allow_none=True, metadata={"description": "the policy it was released under"})
    figure = fields.String(allow_none=True, validate=validate.OneOf(HOLDOUT_FIGURES), metadata={
        "description": "what the score is: this row's own (exact), the dataset's best so far (ladder), or "
                       "thresholdout's answer; null when no figure is shown"})
    ladder = fields.Nested(LadderReadingSchema, allow_none=True)
    summary = fields.String(metadata={"description": "one plain sentence on what the figure is"})


class SubmitterSchema(Schema):
    key = fields.String()
    name = fields.String(allow_none=True)


class BoardEntrySchema(Schema):
    rank = fields.Integer(metadata={"description": "1 = best CV mean of the primary metric"})
    submission = fields.String()
    label = fields.String()
    state = fields.String()
    cv = fields.Nested(BoardCvSchema)
    holdout = fields.Nested(BoardHoldoutSchema)
    verdict = fields.String(allow_none=True, validate=validate.OneOf(DECISIONS))
    policy_version = fields.Integer(allow_none=True, metadata={"description": "the policy it was judged under"})
    judged_under_policy_in_force = fields.Boolean(allow_none=True, metadata={
        "description": "false: judged under an older policy; a steward can re-judge it (POST "
                       "/v1/submissions/{id}/verdicts); null while it has no verdict"})
    submitter = fields.Nested(SubmitterSchema)
    created_at = fields.String(metadata=_DATETIME)
    champion = fields.Boolean()


class BoardSchema(Schema):
    """A dataset's submissions ranked by the CV mean of the policy's primary metric."""

    dataset = fields.String()
    primary_metric = fields.String()
    greater_is_better = fields.Boolean()
    policy_version = fields.Integer()
    champion = fields.String(allow_none=True)
    entries = fields.List(fields.Nested(BoardEntrySchema))
    next_cursor = fields.String(allow_none=True, metadata={"description": "null on the last page"})
    holdout_policies = fields.List(fields.Nested(ReleasedUnderSchema), metadata={
        "description": "every release mode and policy version the board's holdout figures were released under"})
    mixed_policies = fields.String(allow_none=True, metadata={
        "description": "null when every holdout figure on the board was released under one policy; else says so"})
