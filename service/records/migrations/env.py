"""Run the migrations on the connection ``service.records.schema`` hands over in the config's attributes."""

from __future__ import annotations

from alembic import context

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=None)
with context.begin_transaction():
    context.run_migrations()
