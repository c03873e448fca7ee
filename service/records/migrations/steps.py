"""Schema steps the revisions share: each one looks at what is there first.

A database from before the migrations (its tables made by ``create_all`` and patched at start-up) has no
revision; the chain is run on it from the first revision, so every step creates or adds only what is
missing and such a database ends at the same schema as a fresh one.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op


def has_table(name: str) -> bool:
    """Whether the table exists on the migration's connection."""
    return bool(sa.inspect(op.get_bind()).has_table(name))


def column_names(table: str) -> set[str]:
    """The names of the table's columns as the database has them."""
    return {c["name"] for c in sa.inspect(op.get_bind()).get_columns(table)}


def add_column_if_missing(table: str, column: sa.Column[object]) -> None:
    """Add a nullable column unless the table already has it (a start-up patch may have added it)."""
    if column.name not in column_names(table):
        op.add_column(table, column)


def drop_column_if_present(table: str, name: str) -> None:
    """Drop a column if the table has it."""
    if name in column_names(table):
        op.drop_column(table, name)
