"""Spool uploaded files to disk under the data dir while a request receives them.

Each spool file is held under an exclusive ``flock`` for as long as its request uses it, so a
start-up sweep can tell a file left by a killed upload (nobody holds it) from one another API
process on the same data dir is still receiving (held), and remove only the former.
"""

from __future__ import annotations

import fcntl
import os
import shutil
import uuid
from pathlib import Path
from types import TracebackType
from typing import IO

from service.settings import Settings

SPOOL_DIR_NAME = "uploads"
_SUFFIX = ".part"


def spool_dir(settings: Settings) -> Path:
    """The directory uploads are spooled to: ``<data dir>/uploads``."""
    return settings.data_dir / SPOOL_DIR_NAME


class UploadSpool:
    """The spool files of one request: created on demand, locked while open, all removed on exit."""

    def __init__(self, settings: Settings) -> None:
        self.directory = spool_dir(settings)
        self._files: dict[int, tuple[Path, IO[bytes]]] = {}

    def new_file(self) -> IO[bytes]:
        """Create, lock and return a new empty spool file opened for writing and reading."""
        self.directory.mkdir(parents=True, exist_ok=True)
        while True:
            path = self.directory / f"{uuid.uuid4().hex}{_SUFFIX}"
            handle = open(path, "x+b")  # noqa: SIM115 - closed by __exit__
            fcntl.flock(handle, fcntl.LOCK_EX)
            # A sweep may have locked and removed the file between its creation and our lock.
            try:
                if os.stat(path).st_ino == os.fstat(handle.fileno()).st_ino:
                    break
            except FileNotFoundError:
                pass
            handle.close()
        self._files[id(handle)] = (path, handle)
        return handle

    def path_of(self, handle: object) -> Path:
        """Return the path of a spool file this spool created."""
        return self._files[id(handle)][0]

    def __enter__(self) -> UploadSpool:
        return self

    def __exit__(self, kind: type[BaseException] | None, value: BaseException | None,
                 tb: TracebackType | None) -> None:
        for path, handle in self._files.values():
            path.unlink(missing_ok=True)
            handle.close()
        self._files.clear()


def sweep_spool(settings: Settings) -> int:
    """Remove the spool files no live request holds (left by a killed upload); return how many.

    Directories in the spool dir are what earlier releases spooled into; they are removed too.
    """
    directory = spool_dir(settings)
    if not directory.is_dir():
        return 0
    removed = 0
    for entry in directory.iterdir():
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
            removed += 1
            continue
        try:
            with open(entry, "rb") as handle:
                fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
                entry.unlink(missing_ok=True)
                removed += 1
        except BlockingIOError:
            continue  # another process is receiving it right now
        except OSError:
            continue
    return removed
