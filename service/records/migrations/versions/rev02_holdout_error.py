"""Holdout outcomes record a failed refit or scoring: ``holdout_scores.error``.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the nullable error column; existing outcomes were all scored, so it stays empty for them."""
    add_column_if_missing("holdout_scores", sa.Column("error", sa.Text))


def downgrade() -> None:
    """Drop the column."""
    op.drop_column("holdout_scores", "error")
