"""The records schema. JSON columns hold small documents; nothing here holds holdout rows."""

from __future__ import annotations

from sqlalchemy import (
    JSON,
    Column,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()

api_keys = Table(
    "api_keys",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False),
    Column("role", String(20), nullable=False),
    Column("name", String(200), nullable=False, default=""),
    Column("token_hash", String(64), nullable=False, unique=True),
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("revoked_at", DateTime(timezone=True)),
)

datasets = Table(
    "datasets",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False, index=True),
    Column("name", String(200), nullable=False),
    Column("task", String(20), nullable=False),
    Column("target", String(200), nullable=False),
    Column("id_column", String(200)),
    Column("group_column", String(200)),
    Column("time_column", String(200)),
    Column("columns", JSON, nullable=False),  # [{"name", "kind", "dtype"}]
    Column("classes", JSON),  # classification: sorted class labels as strings
    Column("rows_total", Integer, nullable=False),
    Column("rows_development", Integer, nullable=False),
    Column("rows_holdout", Integer, nullable=False),
    Column("holdout_scheme", String(20), nullable=False),
    Column("holdout_fraction", Float, nullable=False),
    Column("sealing_seed", String(40), nullable=False),  # never leaves the service
    Column("fold_plan", JSON, nullable=False),  # {"scheme", "folds", "seed"}
    Column("fingerprint", String(64), nullable=False),  # whole registered table
    Column("development_fingerprint", String(64), nullable=False),
    Column("holdout_fingerprint", String(64), nullable=False),  # checked at every use of the seal
    Column("created_by", String(40), nullable=False),
    Column("created_at", DateTime(timezone=True), nullable=False),
)

submissions = Table(
    "submissions",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False),
    Column("owner_key_id", String(40), nullable=False),
    Column("label", String(200), nullable=False, default=""),
    Column("state", String(20), nullable=False),
    Column("config", JSON, nullable=False),  # the normalised configuration document
    Column("config_fingerprint", String(64), nullable=False),
    Column("folds_total", Integer, nullable=False),
    Column("idempotency_key", String(200)),
    Column("request_fingerprint", String(64)),
    Column("error", Text),
    Column("result", JSON),  # the summary document once computed (without holdout scores)
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("started_at", DateTime(timezone=True)),
    Column("finished_at", DateTime(timezone=True)),
    Column("updated_at", DateTime(timezone=True), nullable=False),
    UniqueConstraint("owner_key_id", "idempotency_key", name="uq_submission_idempotency"),
    Index("ix_submissions_team_created", "team", "created_at"),
    Index("ix_submissions_state", "state"),
)

fold_results = Table(
    "fold_results",
    metadata,
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("repeat", Integer, primary_key=True),
    Column("fold", Integer, primary_key=True),
    Column("status", String(20), nullable=False),  # "ok" | "failed"
    Column("train_rows", Integer, nullable=False),
    Column("test_rows", Integer, nullable=False),
    Column("scores", JSON),
    Column("baseline_scores", JSON),
    Column("coefficients", JSON),  # {"names": [...], "values": [[...] per output]} or null
    Column("fit_seconds", Float),
    Column("score_seconds", Float),
    Column("error", Text),
    Column("finished_at", DateTime(timezone=True), nullable=False),
)

holdout_scores = Table(
    "holdout_scores",
    metadata,
    # One row per submission, ever: the primary key is what makes "scored once" hold under retries.
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("scores", JSON, nullable=False),
    Column("holdout_fingerprint", String(64), nullable=False),
    Column("fit_seconds", Float),
    Column("scored_at", DateTime(timezone=True), nullable=False),
)

audit_events = Table(
    "audit_events",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("at", DateTime(timezone=True), nullable=False),
    Column("actor", String(40), nullable=False),  # key id, or "system"
    Column("team", String(100), nullable=False),
    Column("action", String(60), nullable=False),
    Column("subject", String(80), nullable=False),
    Column("detail", JSON, nullable=False),
)
