"""A verdict that read the holdout may be shown at an earlier, prompt time; the summary's time is kept.

Revision ID: 0015
Revises: 0014

``holdout_claims.prompt_at``: the moment, fixed with the deadline before the seal was opened, at which a
verdict given by then is shown (``service.gate.timing``); null where none was fixed (the verdict waits for
the deadline). ``submissions.summarized_at``: when the cross-validation summary was stored, which tells a
verdict that waited on the folds from one that waited on the sealed step; null on older rows.
``holdout_releases.late``: the release was shown after its prompt time because of the sealed step, which
spent one more unit; null on older rows.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0015"
down_revision = "0014"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the three nullable columns."""
    add_column_if_missing("holdout_claims", sa.Column("prompt_at", sa.DateTime(timezone=True)))
    add_column_if_missing("submissions", sa.Column("summarized_at", sa.DateTime(timezone=True)))
    add_column_if_missing("holdout_releases", sa.Column("late", sa.Boolean))


def downgrade() -> None:
    """Drop them."""
    op.drop_column("holdout_releases", "late")
    op.drop_column("submissions", "summarized_at")
    op.drop_column("holdout_claims", "prompt_at")
