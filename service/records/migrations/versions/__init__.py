"""One module per schema revision, chained by ``down_revision``; Alembic reads them by file."""
