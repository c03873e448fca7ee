"""The cross-validation summary moves from ``submissions.result`` to ``submissions.cv_summary``.

Revision ID: 0004
Revises: 0003

A rename by copy: the new column is added, every old value copied where the new one is still empty
(a start-up patch of an older release may already have filled some), then the old column is dropped so
every database ends with the same columns.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing, column_names, drop_column_if_present

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add cv_summary, copy result into it, drop result."""
    add_column_if_missing("submissions", sa.Column("cv_summary", sa.JSON))
    if "result" in column_names("submissions"):
        op.execute('UPDATE submissions SET cv_summary = "result" WHERE cv_summary IS NULL AND "result" IS NOT NULL')
        drop_column_if_present("submissions", "result")


def downgrade() -> None:
    """Bring result back with the summaries, drop cv_summary."""
    op.add_column("submissions", sa.Column("result", sa.JSON))
    op.execute('UPDATE submissions SET "result" = cv_summary')
    op.drop_column("submissions", "cv_summary")
