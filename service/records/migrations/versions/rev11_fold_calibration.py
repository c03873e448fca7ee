"""Reliability of predicted probabilities: ``fold_results.calibration`` (per-bin counts and sums of a fold).

Revision ID: 0011
Revises: 0010

A classification fold whose model gives probabilities stores, per equal-width bin, the number of
test rows and the sums of their predicted probabilities and outcomes; the summary pools them into
the report's reliability curve and expected calibration error. Older folds have none.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the nullable column; folds scored before it have no bins."""
    add_column_if_missing("fold_results", sa.Column("calibration", sa.JSON))


def downgrade() -> None:
    """Drop the column."""
    op.drop_column("fold_results", "calibration")
