"""A consistent copy of a deployment: the records DB and the data dir, saved together.

The two belong together: the records DB names datasets whose files are in the data dir (development rows,
the sealed holdout, the fingerprint key, the identity marker), and it holds the holdout scores, releases
and budgets that must stay with those files. The records DB is copied first (SQLite's online backup, a
consistent snapshot while the service runs), then the data files: a dataset registered between the two
steps leaves files no record names, which is harmless; the other order could leave records without files.

PostgreSQL records are saved with ``pg_dump`` (the README shows the commands); ``backup`` then copies the
data dir alone. Logs, the upload spool and the embedded Redis's files are not part of a backup.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

from service.settings import Settings

RECORDS_FILE = "records.sqlite3"
# What a data dir holds that is not worth saving (rebuilt, or transient).
_SKIP = {"logs", "uploads", "redis", "redis.sock", "up.lock"}


def backup(settings: Settings, dest: Path) -> list[str]:
    """Copy the deployment into ``dest`` (which must not exist); return what was saved, for the log."""
    if dest.exists():
        raise FileExistsError(f"{dest} exists: a backup goes to a new directory")
    dest.mkdir(parents=True, mode=0o700)
    saved: list[str] = []
    if not settings.database_url:
        source = sqlite3.connect(settings.data_dir / RECORDS_FILE)
        target = sqlite3.connect(dest / RECORDS_FILE)
        try:
            source.backup(target)
        finally:
            target.close()
            source.close()
        (dest / RECORDS_FILE).chmod(0o600)
        saved.append(RECORDS_FILE)
    for entry in sorted(settings.data_dir.iterdir()):
        name = entry.name
        if name in _SKIP or name.startswith(RECORDS_FILE):
            continue
        if entry.is_dir():
            shutil.copytree(entry, dest / name, symlinks=True)
        else:
            shutil.copy2(entry, dest / name)
        saved.append(name)
    return saved
