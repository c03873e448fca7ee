"""The holdout attempt is spent once the seal is opened, and its outcome is shown at a time fixed in advance.

Revision ID: 0014
Revises: 0013

``holdout_claims.opened_at``: when the claim's holder opened the sealed rows. From then on an attempt that
ends without an outcome (the process killed, crashed or past a bound) is stored as one failed attempt and
never computed again; ``holdout_claims.deadline_at``: the moment, fixed before the seal was opened from the
development rows alone, by which that step must have stored its outcome. ``submissions.published_at``: when
a verdict that read the holdout may be shown (``service.gate.timing``); null on rows from before the column
(shown as they are).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing

revision = "0014"
down_revision = "0013"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Add the two nullable columns."""
    add_column_if_missing("holdout_claims", sa.Column("opened_at", sa.DateTime(timezone=True)))
    add_column_if_missing("holdout_claims", sa.Column("deadline_at", sa.DateTime(timezone=True)))
    add_column_if_missing("submissions", sa.Column("published_at", sa.DateTime(timezone=True)))


def downgrade() -> None:
    """Drop them."""
    op.drop_column("submissions", "published_at")
    op.drop_column("holdout_claims", "deadline_at")
    op.drop_column("holdout_claims", "opened_at")
