"""The records schema as first put under migrations: keys, datasets, submissions (summary in ``result``), folds.

Revision ID: 0001
Revises: (none)

Frozen here rather than read from ``service.records.tables``, so later changes to the tables never change
what this revision creates. On a database made before migrations existed, it creates only the missing
tables and adds the missing nullable columns of the ones that are there.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing, has_table

revision = "0001"
down_revision: str | None = None
branch_labels = None
depends_on = None

_tz = sa.DateTime(timezone=True)
baseline = sa.MetaData()

sa.Table(
    "api_keys", baseline,
    sa.Column("id", sa.String(40), primary_key=True),
    sa.Column("team", sa.String(100), nullable=False),
    sa.Column("role", sa.String(20), nullable=False),
    sa.Column("name", sa.String(200), nullable=False),
    sa.Column("token_hash", sa.String(64), nullable=False, unique=True),
    sa.Column("created_at", _tz, nullable=False),
    sa.Column("revoked_at", _tz),
)
sa.Table(
    "datasets", baseline,
    sa.Column("id", sa.String(40), primary_key=True),
    sa.Column("team", sa.String(100), nullable=False, index=True),
    sa.Column("name", sa.String(200), nullable=False),
    sa.Column("task", sa.String(20), nullable=False),
    sa.Column("target", sa.String(200), nullable=False),
    sa.Column("id_column", sa.String(200)),
    sa.Column("group_column", sa.String(200)),
    sa.Column("time_column", sa.String(200)),
    sa.Column("columns", sa.JSON, nullable=False),
    sa.Column("classes", sa.JSON),
    sa.Column("rows_total", sa.Integer, nullable=False),
    sa.Column("rows_development", sa.Integer, nullable=False),
    sa.Column("rows_holdout", sa.Integer, nullable=False),
    sa.Column("holdout_scheme", sa.String(20), nullable=False),
    sa.Column("holdout_fraction", sa.Float, nullable=False),
    sa.Column("sealing_seed", sa.String(40), nullable=False),
    sa.Column("fold_plan", sa.JSON, nullable=False),
    sa.Column("fingerprint", sa.String(64), nullable=False),
    sa.Column("development_fingerprint", sa.String(64), nullable=False),
    sa.Column("holdout_fingerprint", sa.String(64), nullable=False),
    sa.Column("balance", sa.JSON),
    sa.Column("created_by", sa.String(40), nullable=False),
    sa.Column("created_at", _tz, nullable=False),
)
sa.Table(
    "submissions", baseline,
    sa.Column("id", sa.String(40), primary_key=True),
    sa.Column("team", sa.String(100), nullable=False),
    sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), nullable=False),
    sa.Column("owner_key_id", sa.String(40), nullable=False),
    sa.Column("label", sa.String(200), nullable=False),
    sa.Column("state", sa.String(20), nullable=False),
    sa.Column("config", sa.JSON, nullable=False),
    sa.Column("config_fingerprint", sa.String(64), nullable=False),
    sa.Column("folds_total", sa.Integer, nullable=False),
    sa.Column("idempotency_key", sa.String(200)),
    sa.Column("request_fingerprint", sa.String(64)),
    sa.Column("error", sa.Text),
    sa.Column("result", sa.JSON),
    sa.Column("verdict", sa.JSON),
    sa.Column("policy_version", sa.Integer),
    sa.Column("champion_id", sa.String(40)),
    sa.Column("created_at", _tz, nullable=False),
    sa.Column("started_at", _tz),
    sa.Column("finished_at", _tz),
    sa.Column("updated_at", _tz, nullable=False),
    sa.UniqueConstraint("owner_key_id", "idempotency_key", name="uq_submission_idempotency"),
    sa.Index("ix_submissions_team_created", "team", "created_at"),
    sa.Index("ix_submissions_state", "state"),
    sa.Index("ix_submissions_config", "dataset_id", "config_fingerprint"),
)
sa.Table(
    "fold_results", baseline,
    sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
    sa.Column("repeat", sa.Integer, primary_key=True),
    sa.Column("fold", sa.Integer, primary_key=True),
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("train_rows", sa.Integer, nullable=False),
    sa.Column("test_rows", sa.Integer, nullable=False),
    sa.Column("scores", sa.JSON),
    sa.Column("baseline_scores", sa.JSON),
    sa.Column("coefficients", sa.JSON),
    sa.Column("train_scores", sa.JSON),
    sa.Column("curve", sa.JSON),
    sa.Column("search", sa.JSON),
    sa.Column("fit_seconds", sa.Float),
    sa.Column("score_seconds", sa.Float),
    sa.Column("error", sa.Text),
    sa.Column("finished_at", _tz, nullable=False),
)
sa.Table(
    "holdout_scores", baseline,
    sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
    sa.Column("scores", sa.JSON, nullable=False),
    sa.Column("holdout_fingerprint", sa.String(64), nullable=False),
    sa.Column("fit_seconds", sa.Float),
    sa.Column("scored_at", _tz, nullable=False),
)
sa.Table(
    "policies", baseline,
    sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), primary_key=True),
    sa.Column("version", sa.Integer, primary_key=True),
    sa.Column("document", sa.JSON, nullable=False),
    sa.Column("set_by", sa.String(40), nullable=False),
    sa.Column("set_at", _tz, nullable=False),
)
sa.Table(
    "champions", baseline,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), nullable=False, index=True),
    sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), nullable=False),
    sa.Column("promoted_by", sa.String(40), nullable=False),
    sa.Column("promoted_at", _tz, nullable=False),
)
sa.Table(
    "holdout_releases", baseline,
    sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
    sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), nullable=False),
    sa.Column("owner_key_id", sa.String(40), nullable=False),
    sa.Column("mode", sa.String(20), nullable=False),
    sa.Column("released", sa.JSON),
    sa.Column("spent", sa.Integer, nullable=False),
    sa.Column("state", sa.JSON, nullable=False),
    sa.Column("withheld_until", _tz),
    sa.Column("released_at", _tz, nullable=False),
    sa.Index("ix_releases_owner", "dataset_id", "owner_key_id", "released_at"),
)
sa.Table(
    "audit_events", baseline,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("at", _tz, nullable=False),
    sa.Column("actor", sa.String(40), nullable=False),
    sa.Column("team", sa.String(100), nullable=False),
    sa.Column("action", sa.String(60), nullable=False),
    sa.Column("subject", sa.String(80), nullable=False),
    sa.Column("detail", sa.JSON, nullable=False),
)


def upgrade() -> None:
    """Create the missing tables; give tables made before migrations their missing nullable columns."""
    bind = op.get_bind()
    for table in baseline.sorted_tables:
        if not has_table(table.name):
            table.create(bind)
            continue
        for column in table.columns:
            if column.nullable and not column.primary_key:
                add_column_if_missing(table.name, sa.Column(column.name, column.type))


def downgrade() -> None:
    """Drop every table."""
    baseline.drop_all(op.get_bind())
