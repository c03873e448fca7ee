"""Registration warnings on a dataset record (``datasets.warnings``).

Revision ID: 0012
Revises: 0011

The structure a steward did not declare (a column that looks like groups, rows in time order) is
found at registration and kept with the record; older records have none (null).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0012"
down_revision = "0011"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the nullable warnings column."""
    add_column_if_missing("datasets", sa.Column("warnings", sa.JSON))


def downgrade() -> None:
    """Drop the warnings column."""
    op.drop_column("datasets", "warnings")
