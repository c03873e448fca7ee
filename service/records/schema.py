"""The records schema's revision: upgrade a database to this code's, and refuse to run on any other.

The schema changes only through the Alembic revisions in ``migrations/versions``, applied by one process
(``sealfold db upgrade``, the embedded stack, the test fixtures) before the API and workers start. The
API and workers only check the revision, so several processes starting at once never race to create
tables or types.
"""

from __future__ import annotations

import functools
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, Engine, text

MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"
# Held for the upgrade's transaction on PostgreSQL, so two upgrades started at once run one after the other.
UPGRADE_LOCK_KEY = 0x5EA1F01D


class SchemaOutOfDate(RuntimeError):
    """The records database is not at the revision this code needs."""

    def __init__(self, current: str | None, needed: str) -> None:
        self.current, self.needed = current, needed
        at = current or "none (empty, or made before migrations)"
        if current is not None and current not in revision_chain():
            hint = "it was upgraded by a newer release: run that release"
        else:
            hint = "run `sealfold db upgrade`"
        super().__init__(f"the records database is at revision {at}, this code needs {needed}: {hint}")


def _config(connection: Connection | None = None) -> Config:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


@functools.cache
def _script() -> ScriptDirectory:
    return ScriptDirectory.from_config(_config())


def head_revision() -> str:
    """The revision this code needs: the newest in the chain (Alembic raises if the chain has forked)."""
    head = _script().get_current_head()
    if head is None:  # pragma: no cover - the package ships its revisions
        raise RuntimeError(f"no migrations under {MIGRATIONS_DIR}")
    return head


def revision_chain() -> list[str]:
    """Every revision in this code's chain, newest first."""
    return [script.revision for script in _script().walk_revisions()]


def current_revision(engine: Engine) -> str | None:
    """The database's revision, or None when it has none (empty, or made before migrations)."""
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Apply the revisions the database lacks, in one transaction, up to ``revision`` (default the newest)."""
    with engine.begin() as conn:
        if conn.dialect.name == "postgresql":
            conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": UPGRADE_LOCK_KEY})
        command.upgrade(_config(conn), revision)


def require_current(engine: Engine) -> None:
    """Raise ``SchemaOutOfDate`` unless the database is at this code's revision."""
    current, needed = current_revision(engine), head_revision()
    if current != needed:
        raise SchemaOutOfDate(current, needed)
