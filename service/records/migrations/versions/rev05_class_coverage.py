"""Classes a fold lacks: ``fold_results.undefined`` (metrics left undefined, with why) and ``submissions.warnings``.

Revision ID: 0005
Revises: 0004

Both came with scoring every fold against the dataset's classes: a fold whose test rows lack a class
leaves some metrics undefined, and a submission whose fold plan trains a fold without a class is
warned at submission.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add both nullable columns; older rows had nothing undefined and no warnings recorded."""
    add_column_if_missing("fold_results", sa.Column("undefined", sa.JSON))
    add_column_if_missing("submissions", sa.Column("warnings", sa.JSON))


def downgrade() -> None:
    """Drop both columns."""
    op.drop_column("submissions", "warnings")
    op.drop_column("fold_results", "undefined")
