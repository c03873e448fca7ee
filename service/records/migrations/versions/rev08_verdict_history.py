"""Every verdict a submission was given, with its policy version (``verdicts``).

Revision ID: 0008
Revises: 0007

A steward may re-judge a submission under a newer policy; each verdict is kept, the newest also in
``submissions.verdict``. Existing verdicts are copied in as the first of their submission's history,
judged by "system" when the submission finished (its last update on rows without a finish time).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import has_table

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Create the verdict history and copy each stored verdict into it."""
    if has_table("verdicts"):
        return
    op.create_table(
        "verdicts",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("submission_id", sa.String(40), sa.ForeignKey("submissions.id"), nullable=False),
        sa.Column("dataset_id", sa.String(40), sa.ForeignKey("datasets.id"), nullable=False),
        sa.Column("owner_key_id", sa.String(40), nullable=False),
        sa.Column("policy_version", sa.Integer),
        sa.Column("champion_id", sa.String(40)),
        sa.Column("verdict", sa.JSON, nullable=False),
        sa.Column("judged_by", sa.String(40), nullable=False),
        sa.Column("judged_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("holdout_spent", sa.Integer, nullable=False, server_default="0"),
    )
    op.create_index("ix_verdicts_submission", "verdicts", ["submission_id", "id"])
    op.create_index("ix_verdicts_spent", "verdicts", ["dataset_id", "owner_key_id", "judged_at"])
    op.execute(
        "INSERT INTO verdicts (submission_id, dataset_id, owner_key_id, policy_version, champion_id, verdict, "
        "judged_by, judged_at, holdout_spent) "
        "SELECT id, dataset_id, owner_key_id, policy_version, champion_id, verdict, 'system', "
        "COALESCE(finished_at, updated_at), 0 FROM submissions WHERE verdict IS NOT NULL "
        "ORDER BY created_at, id"
    )


def downgrade() -> None:
    """Drop the verdict history (submissions.verdict keeps the newest verdict)."""
    op.drop_index("ix_verdicts_spent", table_name="verdicts")
    op.drop_index("ix_verdicts_submission", table_name="verdicts")
    op.drop_table("verdicts")
