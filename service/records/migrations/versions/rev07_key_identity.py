"""Budgets per person and team, and one submission per configuration: key identities and config keys.

Revision ID: 0007
Revises: 0006

- ``api_keys.identity``: whose key it is (a person or a CI identity, unique within the team); keys
  made before it have none and each stays its own identity (its id).
- ``holdout_releases.identity``: the identity whose budget a holdout query spent (older rows: null,
  read as their ``owner_key_id``), and ``outcome``: released, withheld, or failed (the attempt raised;
  older rows: null, read from ``released``).
- ``submissions.config_key``: one submission per (team, dataset, configuration fingerprint, policy
  version) under any concurrency, by a unique index. Older rows keep null (the intake still finds
  them by their configuration fingerprint); a canceled submission or one failed by the infrastructure
  gets a key of its own, so the configuration may run again.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from service.records.migrations.steps import add_column_if_missing, drop_column_if_present

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def _indexes(table: str) -> set[str]:
    return {str(ix["name"]) for ix in sa.inspect(op.get_bind()).get_indexes(table)}


def upgrade() -> None:
    """Add the nullable columns and the unique index on submissions.config_key."""
    add_column_if_missing("api_keys", sa.Column("identity", sa.String(100)))
    add_column_if_missing("holdout_releases", sa.Column("identity", sa.String(100)))
    add_column_if_missing("holdout_releases", sa.Column("outcome", sa.String(20)))
    add_column_if_missing("submissions", sa.Column("config_key", sa.String(64)))
    if "uq_submissions_config_key" not in _indexes("submissions"):
        op.create_index("uq_submissions_config_key", "submissions", ["config_key"], unique=True)
    if "ix_api_keys_identity" not in _indexes("api_keys"):
        op.create_index("ix_api_keys_identity", "api_keys", ["team", "identity"])
    if "ix_releases_identity" not in _indexes("holdout_releases"):
        op.create_index("ix_releases_identity", "holdout_releases", ["dataset_id", "identity", "released_at"])


def downgrade() -> None:
    """Drop the indexes, then the columns."""
    op.drop_index("ix_releases_identity", "holdout_releases")
    op.drop_index("ix_api_keys_identity", "api_keys")
    op.drop_index("uq_submissions_config_key", "submissions")
    drop_column_if_present("submissions", "config_key")
    drop_column_if_present("holdout_releases", "outcome")
    drop_column_if_present("holdout_releases", "identity")
    drop_column_if_present("api_keys", "identity")
