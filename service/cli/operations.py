"""Operator commands that act on a deployment's files: ``sealfold backup``."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def cmd_backup(args: argparse.Namespace) -> int:
    """Save the records DB and the data dir into ``args.dest``; exit 1 with the reason when that fails."""
    from service.ops.backup import backup
    from service.settings import Settings

    settings = Settings.load()
    try:
        saved = backup(settings, Path(args.dest))
    except (OSError, FileExistsError) as exc:
        print(f"sealfold backup: {exc}", file=sys.stderr)
        return 1
    if settings.database_url:
        print("sealfold backup: the records DB is PostgreSQL: save it with pg_dump (see the README)",
              file=sys.stderr)
    print(f"saved {', '.join(saved)} to {args.dest}")
    return 0
