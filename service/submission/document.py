"""Compose the submission document a team member reads (``GET /v1/submissions/{id}``).

One place builds it, from the records alone: the submission row, its fold rows, its stored summary,
its holdout release and its verdict. The holdout part is what the release policy let out -- never
the raw score, rows, ids or predictions.

Its ETag is derived from what it is built from (``records.submission_versions``), not from the built
document, so a client polling with ``If-None-Match`` is answered after one query. The same function
gives the ETag of a built document (from the reads that built it) and of an unbuilt one (from the
version query), so the two always agree; the release enters only as the holdout part the document
shows, never the release mechanism's private state.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime
from typing import Any

from sqlalchemy import Engine

from service.gate import timing
from service.gate.review_state import holdout_part
from service.records import holdout_releases, submissions
from service.records.engine import as_utc, iso, utcnow
from service.records.submission_versions import SubmissionVersion

# Part of every ETag: a release that changes how documents are built changes it, so no client keeps
# a document of the old shape on a 304.
DOCUMENT_FORMAT = 1


def submission_document(engine: Engine, row: dict[str, Any]) -> dict[str, Any]:
    """Return the document for one submission row."""
    return document_and_etag(engine, row)[0]


def document_and_etag(engine: Engine, row: dict[str, Any]) -> tuple[dict[str, Any], str]:
    """Return the document for one submission row and its ETag (unquoted).

    A verdict not yet to be shown reads as still running (``service.gate.timing``), with no holdout part;
    its row's ``updated_at`` stayed where it was, so the ETag is the one the document had before.
    """
    row = timing.shown_as(row, utcnow())
    folds = submissions.fold_rows(engine, row["id"])
    release = None if row["held_back"] else holdout_releases.get(engine, row["id"])
    etag = _etag(row["id"], row["state"], row["updated_at"], len(folds), row.get("policy_version"), release)
    return _compose(row, folds, release), etag


def version_etag(version: SubmissionVersion) -> str:
    """Return the ETag (unquoted) of the document this version would build, without building it.

    Masked as the document is: a verdict not yet to be shown gives the ETag of the running document it
    replaced, so the moment it was stored (which can depend on the sealed rows) does not show as a change.
    """
    if timing.unpublished({"published_at": version.published_at}, utcnow()):
        return _etag(version.id, "running", version.updated_at, version.folds_done, None, None)
    return _etag(version.id, version.state, version.updated_at, version.folds_done, version.policy_version,
                 version.release)


def _etag(sub_id: str, state: str, updated_at: datetime, folds_done: int, policy_version: int | None,
          release: dict[str, Any] | None) -> str:
    stamp = as_utc(updated_at)
    parts = [DOCUMENT_FORMAT, sub_id, state, None if stamp is None else stamp.isoformat(), folds_done,
             holdout_part(release, state, policy_version)]
    canonical = json.dumps(parts, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def _compose(row: dict[str, Any], folds: list[dict[str, Any]], release: dict[str, Any] | None) -> dict[str, Any]:
    config = row["config"]
    return {
        "id": row["id"],
        "dataset": row["dataset_id"],
        "label": row["label"],
        "state": row["state"],
        "progress": {"folds_done": len(folds), "folds_total": row["folds_total"]},
        "created_at": iso(row["created_at"]),
        "started_at": iso(row["started_at"]),
        "finished_at": iso(row["finished_at"]),
        "error": row["error"],
        "failure_cause": row.get("failure_cause"),
        "warnings": row.get("warnings") or [],
        "config": {k: config[k] for k in ("model", "validation", "metrics")}
        | ({"search": config["search"]} if config.get("search") else {}),
        "config_fingerprint": row["config_fingerprint"],
        "result": _result(row, folds, release),
    }


def _result(row: dict[str, Any], folds: list[dict[str, Any]], release: dict[str, Any] | None) -> dict[str, Any] | None:
    summary = row["cv_summary"]
    if summary is None and not folds:
        return None
    summary = summary or {}
    return {
        "cv": {
            "folds": [_fold(f) for f in folds],
            "summary": summary.get("summary"),
            "failures": summary.get("failures", []),
        },
        "coefficients": summary.get("coefficients"),
        "fit_gap": summary.get("fit_gap"),
        "learning_curve": summary.get("learning_curve"),
        "learning_curve_note": summary.get("learning_curve_note"),
        "search": summary.get("search"),
        "calibration": summary.get("calibration"),
        "baseline": summary.get("baseline"),
        # only what the release policy lets out, never the raw score
        "holdout": holdout_part(release, row["state"], row.get("policy_version")),
        "verdict": row["verdict"],
        "provenance": summary.get("provenance"),
    }


def _fold(f: dict[str, Any]) -> dict[str, Any]:
    out = {
        "fold": f["fold"], "repeat": f["repeat"], "status": f["status"],
        "train_rows": f["train_rows"], "test_rows": f["test_rows"],
        "scores": f["scores"], "baseline_scores": f["baseline_scores"],
        "fit_seconds": f["fit_seconds"], "score_seconds": f["score_seconds"],
    }
    for optional in ("undefined", "train_scores", "train_scored_rows", "curve", "search"):
        if f.get(optional) is not None:
            out[optional] = f[optional]
    if f["error"]:
        out["error"] = f["error"]
    return out
