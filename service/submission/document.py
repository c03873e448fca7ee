"""Compose the submission document a team member reads (``GET /v1/submissions/{id}``).

One place builds it, from the records alone: the submission row, its fold rows, its stored summary,
its holdout release and its verdict. The holdout part is what the release policy let out -- never
the raw score, rows, ids or predictions.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine

from service.gate import timing
from service.gate.review_state import holdout_part
from service.records import holdout_releases, submissions
from service.records.engine import iso, utcnow


def submission_document(engine: Engine, row: dict[str, Any]) -> dict[str, Any]:
    """Return the document for one submission row; a verdict not yet to be shown reads as still running."""
    row = timing.shown_as(row, utcnow())
    folds = submissions.fold_rows(engine, row["id"])
    release = None if row["held_back"] else holdout_releases.get(engine, row["id"])
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
