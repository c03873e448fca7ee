"""Submission endpoints: submit (202), list, read with ETag, fold membership, cancel.

Accepting a submission -- dataset scoping, fingerprint pin, configuration checks, the insert and
the enqueue -- is ``service.submission.intake``'s; the document is ``service.submission.document``'s. This
module only parses, authorizes, and shapes HTTP around them.
"""

from __future__ import annotations

import base64
import binascii
import json
from datetime import datetime
from typing import Any

from flask import Response, current_app, request
from flask.views import MethodView
from marshmallow import EXCLUDE, Schema, fields, validate

from service import team_scope
from service.api import SealfoldBlueprint, json_response, service_context
from service.api.auth import current_key, team_dataset, team_submission
from service.api.submission_schemas import (
    FoldRowsSchema,
    SubmissionListQuerySchema,
    SubmissionListSchema,
    SubmissionRequestSchema,
    SubmissionSchema,
)
from service.errors import InputError, field_error
from service.gate.review_state import policy_in_force
from service.records import submissions
from service.records.engine import as_utc, iso
from service.submission import intake
from service.submission.config import SubmissionRequest
from service.submission.document import document_and_etag, submission_document, version_etag
from service.submission.resolved import ValidationPlan
from service.submission.resubmission import resubmission_note
from service.vault.folds import fold_splits, split_keys_from_frame
from service.vault.store import load_development_frame

blp = SealfoldBlueprint("submissions", __name__, url_prefix="/v1/submissions",
                        description="Submit model configurations for review and read their results.")


class IdempotencyHeaderSchema(Schema):
    class Meta:
        unknown = EXCLUDE

    idempotency_key = fields.String(
        data_key="Idempotency-Key", load_default=None, validate=validate.Length(min=1, max=200),
        metadata={"description": "retrying with the same key and body returns the first submission"},
    )


def _location(sub_id: str) -> dict[str, str]:
    return {"Location": f"/v1/submissions/{sub_id}"}


def encode_cursor(row: dict[str, Any]) -> str:
    """Opaque page cursor: the (created_at, id) of the last submission on the page."""
    raw = json.dumps([iso(row["created_at"]), row["id"]]).encode("utf-8")
    return base64.urlsafe_b64encode(raw).decode("ascii").rstrip("=")


def decode_cursor(cursor: str) -> tuple[datetime, str]:
    """Inverse of ``encode_cursor``; a cursor that was not made by it is a 422 on /cursor."""
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        at, sub_id = json.loads(raw)
        stamp = as_utc(datetime.fromisoformat(str(at).replace("Z", "+00:00")))
    except (binascii.Error, ValueError, TypeError, UnicodeDecodeError):
        stamp = None
    if stamp is None or not isinstance(sub_id, str):
        raise field_error(InputError, "/cursor", f"cursor must be a next_cursor from an earlier page, "
                          f"got {cursor[:40]!r}")
    return stamp, sub_id


_VALIDATOR_HEADERS = {"ETag": {"description": "a strong validator of the document; send it back in If-None-Match",
                               "schema": {"type": "string"}},
                      "Cache-Control": {"schema": {"type": "string"}}}


def _with_validator(response: Response, etag: str) -> Response:
    response.set_etag(etag)
    response.headers["Cache-Control"] = "private, no-cache"  # a cache may keep it, but must ask again first
    return response


@blp.route("")
class SubmissionCollection(MethodView):
    @blp.requires("submitter")
    @blp.arguments(IdempotencyHeaderSchema, location="headers")
    @blp.arguments(SubmissionRequestSchema)
    @blp.response(202, SubmissionSchema, description="Accepted: the folds are queued",
                  headers={"Location": {"schema": {"type": "string"}}})
    @blp.alt_response(200, schema=SubmissionSchema, success=True,
                      description="A replay: the submission first made with this Idempotency-Key; or the team's "
                                  "earlier submission of the same configuration, with a 'resubmission' note "
                                  "saying which policy version judged it and how to re-judge it")
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.problem(409, "The pinned dataset fingerprint does not match")
    @blp.problem(415, "The body is not JSON")
    @blp.problem(422, "The configuration is rejected, or the Idempotency-Key was used with another body")
    @blp.problem(429, "The team already has the most submissions queued or running it may have")
    @blp.problem(503, "No checker answered the configuration check, or the queue is down")
    def post(self, headers: dict[str, Any], submission: SubmissionRequest) -> Response:
        """Submit a model configuration for review."""
        ctx, caller = service_context(), current_key()
        key = headers["idempotency_key"]
        row, created = intake.submit(ctx.engine, ctx.redis, ctx.settings, caller, submission, key)
        document = submission_document(ctx.engine, row)
        replay = key is not None and row["idempotency_key"] == key and row["owner_key_id"] == caller.id
        if not created and not replay:
            dataset = team_scope.team_dataset(ctx.engine, caller, row["dataset_id"])
            version = int(policy_in_force(ctx.engine, dataset)["version"])
            document["resubmission"] = resubmission_note(row, submission.label, version)
        return json_response(document, 202 if created else 200, _location(row["id"]))

    @blp.requires("submitter")
    @blp.arguments(SubmissionListQuerySchema, location="query")
    @blp.response(200, SubmissionListSchema)
    def get(self, query: dict[str, Any]) -> Response:
        """List the team's submissions, newest first, a page at a time."""
        ctx, caller = service_context(), current_key()
        before = None if query["cursor"] is None else decode_cursor(query["cursor"])
        dataset_id = None if query["dataset"] is None else team_dataset(caller, query["dataset"])["id"]
        limit = query["limit"]
        rows = submissions.list_for_team(ctx.engine, caller.team, limit + 1, before, dataset_id)
        page = rows[:limit]
        return json_response({
            "submissions": [submission_document(ctx.engine, row) for row in page],
            "next_cursor": encode_cursor(page[-1]) if len(rows) > limit else None,
        })


@blp.route("/<sub_id>")
class SubmissionItem(MethodView):
    @blp.requires("submitter")
    @blp.doc(parameters=[{"in": "header", "name": "If-None-Match", "required": False,
                          "description": "the ETag of the document last read: 304 when it has not changed",
                          "schema": {"type": "string"}}])
    @blp.response(200, SubmissionSchema, headers=_VALIDATOR_HEADERS)
    @blp.alt_response(304, description="Not modified since the ETag sent in If-None-Match: no body, the same ETag",
                      headers=_VALIDATOR_HEADERS)
    @blp.problem(404, "No such submission in the caller's team")
    def get(self, sub_id: str) -> Response:
        """Read a submission: state, progress and, once computed, its result.

        Poll with the ETag of the last answer in ``If-None-Match``: an unchanged submission is answered
        304 without a body, and every change to the document (state, a fold, the summary, the holdout
        part, the verdict) gives it a new ETag.
        """
        ctx, caller = service_context(), current_key()
        # One query tells the version: unchanged for a poller (304), or a document this process just built.
        etag = version_etag(team_scope.team_submission_version(ctx.engine, caller, sub_id))
        if request.if_none_match.contains_weak(etag):
            return _with_validator(Response(status=304), etag)
        body = ctx.recent_documents.get(sub_id, etag)
        if body is None:
            document, etag = document_and_etag(ctx.engine, team_submission(caller, sub_id))
            body = current_app.json.dumps(document) + "\n"
            ctx.recent_documents.put(sub_id, etag, body)
        return _with_validator(Response(body, mimetype="application/json"), etag)

    @blp.requires("submitter")
    @blp.response(200, SubmissionSchema, description="Canceled")
    @blp.problem(404, "No such submission in the caller's team")
    @blp.problem(409, "The submission has already finished")
    def delete(self, sub_id: str) -> Response:
        """Cancel a queued or running submission (its owner, or a steward of the team)."""
        ctx = service_context()
        row = intake.cancel(ctx.engine, ctx.redis, ctx.settings, current_key(), sub_id)
        return json_response(submission_document(ctx.engine, row))


@blp.route("/<sub_id>/folds")
class SubmissionFolds(MethodView):
    @blp.requires("submitter")
    @blp.response(200, FoldRowsSchema)
    @blp.problem(404, "No such submission in the caller's team")
    def get(self, sub_id: str) -> Response:
        """List each fold's test rows by development row_id (holdout rows are never in any fold)."""
        caller = current_key()
        row = team_submission(caller, sub_id)
        validation = ValidationPlan.from_document(row["config"]["validation"])
        return json_response({"folds": fold_test_rows(team_dataset(caller, row["dataset_id"]), validation)})


def fold_test_rows(dataset: dict[str, Any], validation: ValidationPlan) -> list[dict[str, Any]]:
    """Recompute a submission's folds from its dataset and validation plan; answer row ids per fold."""
    plan = validation.fold_plan()
    target, group, time = dataset["target"], dataset.get("group_column"), dataset.get("time_column")
    wanted = list(dict.fromkeys(["row_id", target, *(c for c in (group, time) if c)]))
    frame = load_development_frame(service_context().settings, dataset["id"], columns=wanted)
    keys = split_keys_from_frame(frame, plan, target, group, time)
    row_ids = frame["row_id"].astype(str).to_numpy()
    splits = sorted(fold_splits(plan, keys, validation.repeats), key=lambda s: (s.repeat, s.fold))
    return [{"fold": s.fold, "repeat": s.repeat, "test_row_ids": row_ids[s.test].tolist()} for s in splits]
