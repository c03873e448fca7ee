"""Schemas of the verdict history and of re-judging under the policy in force (documentation and query checks)."""

from __future__ import annotations

from marshmallow import EXCLUDE, Schema, fields, validate

from service.api.submission_schemas import VerdictSchema
from service.vocabulary import DECISIONS

_DATETIME = {"format": "date-time"}


class JudgedSchema(Schema):
    decision = fields.String(allow_none=True, validate=validate.OneOf(DECISIONS))
    policy_version = fields.Integer(allow_none=True, metadata={"description": "the policy it was judged under"})
    champion = fields.String(allow_none=True, metadata={"description": "the champion it was judged against"})


class HistoryEntrySchema(Schema):
    policy_version = fields.Integer(allow_none=True)
    champion = fields.String(allow_none=True)
    verdict = fields.Nested(VerdictSchema)
    judged_by = fields.String(metadata={"description": "'system' (the first verdict) or the re-judging steward's "
                                                       "key id"})
    judged_at = fields.String(metadata=_DATETIME)
    holdout_spent = fields.Integer(metadata={
        "description": "units of the submitter's holdout budget this verdict used (1: a re-judge asked the "
                       "holdout a question no earlier verdict had answered)"})


class VerdictHistorySchema(Schema):
    """A submission's verdicts, oldest first; the last is the one in force."""

    submission = fields.String()
    policy_version_in_force = fields.Integer(metadata={"description": "the dataset's policy version now"})
    judged_under_policy_in_force = fields.Boolean(allow_none=True, metadata={
        "description": "null while the submission has no verdict"})
    history = fields.List(fields.Nested(HistoryEntrySchema))


class RejudgedSchema(Schema):
    """What one re-judge did."""

    submission = fields.String()
    rejudged = fields.Boolean(metadata={"description": "false: already judged under the policy and champion in "
                                                       "force, or it cannot be (see note)"})
    note = fields.String(metadata={"description": "one plain sentence"})
    before = fields.Nested(JudgedSchema)
    after = fields.Nested(JudgedSchema)
    holdout_spent = fields.Integer()


class RejudgeOneSchema(RejudgedSchema):
    verdict = fields.Nested(VerdictSchema, metadata={"description": "the verdict in force after the re-judge"})


class RejudgeDatasetBodySchema(Schema):
    class Meta:
        unknown = EXCLUDE

    limit = fields.Integer(load_default=100, validate=validate.Range(1, 200), metadata={
        "description": "submissions re-judged in this call, oldest first"})
    after = fields.String(load_default=None, validate=validate.Length(min=1, max=40), metadata={
        "description": "next_after of the previous call"})


class RejudgeDatasetSchema(Schema):
    dataset = fields.String()
    policy_version = fields.Integer(metadata={"description": "the policy in force they were re-judged under"})
    results = fields.List(fields.Nested(RejudgedSchema))
    next_after = fields.String(allow_none=True, metadata={
        "description": "null when every submission judged under another version was visited; else send it as "
                       "'after' to go on"})
