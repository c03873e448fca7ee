"""One holdout computation per submission (``holdout_claims``) and each release's policy version.

Revision ID: 0006
Revises: 0005

``holdout_claims`` lets exactly one holdout job refit and score a submission's sealed rows;
``holdout_releases.policy_version`` records the policy a figure was released under, so the board
can say when it shows figures released under different policies (older rows fall back to the
submission's policy version).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing, has_table

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Create the claims table and add the nullable release column."""
    if not has_table("holdout_claims"):
        op.create_table(
            "holdout_claims",
            sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), primary_key=True),
            sa.Column("token", sa.String(40), nullable=False),
            sa.Column("heartbeat_at", sa.DateTime(timezone=True), nullable=False),
        )
    add_column_if_missing("holdout_releases", sa.Column("policy_version", sa.Integer))


def downgrade() -> None:
    """Drop the release column and the claims table."""
    op.drop_column("holdout_releases", "policy_version")
    op.drop_table("holdout_claims")
