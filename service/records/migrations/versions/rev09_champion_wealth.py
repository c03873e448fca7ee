"""The champion decision on the sealed rows and the champion on other fold plans.

Revision ID: 0009
Revises: 0008

One row per submission whose candidate was compared with the champion on the sealed rows: the
level its test ran at (the online procedure's allowance, LORD++ by default), whether it passed,
and its place in the dataset's stream; the online procedure's state per dataset is these rows.
``champion_folds`` caches the champion's configuration scored on a candidate's fold plan when it
differs from the champion's own, one row per (champion, plan, repeat, fold).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import has_table

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Create the champion tests and champion folds tables."""
    if not has_table("champion_tests"):
        op.create_table(
            "champion_tests",
            sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
            sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), nullable=False),
            sa.Column("champion_id", sa.String(40), sa.ForeignKey("submissions.id"), nullable=False),
            sa.Column("seq", sa.Integer),
            sa.Column("level", sa.Float),
            sa.Column("passed", sa.Boolean),
            sa.Column("entry", sa.JSON, nullable=False),
            sa.Column("tested_at", sa.DateTime(timezone=True), nullable=False),
            sa.UniqueConstraint("dataset_id", "seq", name="uq_champion_tests_seq"),
        )
    if not has_table("champion_folds"):
        op.create_table(
            "champion_folds",
            sa.Column("champion_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
            sa.Column("plan", sa.String(80), primary_key=True),
            sa.Column("repeat", sa.Integer, primary_key=True),
            sa.Column("fold", sa.Integer, primary_key=True),
            sa.Column("status", sa.String(20), nullable=False),
            sa.Column("scores", sa.JSON),
            sa.Column("train_rows", sa.Integer, nullable=False),
            sa.Column("test_rows", sa.Integer, nullable=False),
            sa.Column("error", sa.Text),
            sa.Column("finished_at", sa.DateTime(timezone=True), nullable=False),
        )


def downgrade() -> None:
    """Drop both tables."""
    op.drop_table("champion_folds")
    op.drop_table("champion_tests")
