"""Facts about the deployment as a whole: ``deployment`` (the data identity the workers check).

Revision ID: 0010
Revises: 0009

``deployment.data_identity`` is matched with ``<data dir>/deployment-id`` by every worker before it takes
a job, so a worker on a host without the shared data volume refuses work instead of losing folds.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import has_table

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Create the deployment table."""
    if not has_table("deployment"):
        op.create_table(
            "deployment",
            sa.Column("name", sa.String(60), primary_key=True),
            sa.Column("value", sa.String(200), nullable=False),
        )


def downgrade() -> None:
    """Drop the deployment table."""
    op.drop_table("deployment")
