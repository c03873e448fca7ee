"""A failed submission names why it failed: ``submissions.failure_cause``.

Revision ID: 0013
Revises: 0012

One of ``service.vocabulary.FAILURE_CAUSES`` (the model's own error on every fold, or work lost to
a bound or to the infrastructure: timeout, memory limit, missing data, crash); null while the
submission has not failed, and for submissions that failed before the column existed.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0013"
down_revision = "0012"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the nullable cause column."""
    add_column_if_missing("submissions", sa.Column("failure_cause", sa.String(20)))


def downgrade() -> None:
    """Drop the column."""
    op.drop_column("submissions", "failure_cause")
