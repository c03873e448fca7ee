"""Fold results say how many training rows their training scores were computed on: ``train_scored_rows``.

Revision ID: 0003
Revises: 0002
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the nullable count; folds scored before it leave it empty."""
    add_column_if_missing("fold_results", sa.Column("train_scored_rows", sa.Integer))


def downgrade() -> None:
    """Drop the column."""
    op.drop_column("fold_results", "train_scored_rows")
