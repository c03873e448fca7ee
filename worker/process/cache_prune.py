"""Keep a fetching worker's cache of development files under its cap, the datasets used longest ago going first.

A worker without the shared disk (``SEALFOLD_DATA_SOURCE=api``) keeps every dataset it fetched under
``<data dir>/datasets/<id>/``. Each time a job asks for a dataset (``DataFetcher.development``) it marks the
dataset used (``mark_used``); each time files were fetched, ``prune`` removes whole datasets, the ones used
longest ago first, until the cache is back under ``SEALFOLD_DATA_CACHE_MAX_MB``. Removed files are fetched
again by the next job that needs them.

Never removed: the dataset the job is fetching, and any dataset used within ``idle_seconds`` -- the longest a
job may run, plus a margin -- because a job opens its files after asking for them, at any time until its
timeout. So the cache may stay above its cap while every dataset in it is that recent.

Processes of one host share the cache: the mark is made under a shared lock of the cache and the pruning
under an exclusive one (``flock``), so a dataset marked while a prune is deciding is either seen as just used
or removed before the mark (and then fetched whole again). A dataset is renamed out of the way under the lock
and its files deleted after it, so no reader ever finds half of one and no job waits for a deletion; a rename
left by a pruner that died is deleted by the next prune.
"""

from __future__ import annotations

import contextlib
import fcntl
import logging
import os
import shutil
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

log = logging.getLogger(__name__)

LOCK_NAME = ".cache.lock"
USED_NAME = ".last-used"
PRUNED_PREFIX = ".pruned-"


@dataclass(frozen=True)
class Removed:
    """A dataset pruned from the cache: its id, the bytes it held, and when it was last used (epoch seconds)."""

    dataset_id: str
    size_bytes: int
    last_used: float


@contextlib.contextmanager
def cache_lock(datasets_dir: Path, *, exclusive: bool) -> Iterator[None]:
    """Hold the cache's lock (shared: marking a dataset used; exclusive: pruning) for the block."""
    datasets_dir.mkdir(parents=True, exist_ok=True)
    handle = os.open(datasets_dir / LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(handle, fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH)
        yield
    finally:
        os.close(handle)  # closing the only descriptor releases the lock


def mark_used(datasets_dir: Path, ds_id: str) -> Path:
    """Make ``datasets_dir/ds_id`` exist and record that a job is using it now; return the directory."""
    root = datasets_dir / ds_id
    with cache_lock(datasets_dir, exclusive=False):
        root.mkdir(parents=True, exist_ok=True)
        (root / USED_NAME).touch()
    return root


def prune(datasets_dir: Path, keep: str, cap_bytes: int, idle_seconds: float, now: float) -> list[Removed]:
    """Remove datasets other than ``keep``, used longest ago first, until the cache holds at most ``cap_bytes``;
    none used within ``idle_seconds`` of ``now``. Return what was removed, in that order."""
    removed: list[Removed] = []
    doomed = []  # renamed under the lock, deleted after it: marking waits for the decision, not the deletion
    with cache_lock(datasets_dir, exclusive=True):
        entries = []
        for entry in datasets_dir.iterdir():
            if entry.name.startswith(PRUNED_PREFIX):
                doomed.append(entry)  # left by a pruner that died mid-way
            elif entry.is_dir() and not entry.name.startswith("."):
                entries.append((_last_used(entry), _size(entry), entry))
        total = sum(size for _, size, _ in entries)
        for last_used, size, entry in sorted(entries):
            if total <= cap_bytes:
                break
            if entry.name == keep or last_used > now - idle_seconds:
                continue
            doomed.append(entry.with_name(f"{PRUNED_PREFIX}{entry.name}-{uuid.uuid4().hex[:8]}"))
            os.rename(entry, doomed[-1])
            total -= size
            removed.append(Removed(entry.name, size, last_used))
            log.info("removed cached dataset %s (%.1f MiB, last used %.0f s ago) to keep the cache under %d MiB",
                     entry.name, size / 2**20, now - last_used, cap_bytes >> 20)
    for path in doomed:
        shutil.rmtree(path, ignore_errors=True)
    return removed


def _last_used(root: Path) -> float:
    """When a job last asked for the dataset: its mark, or the directory's own time (a cache without marks)."""
    times = [root.stat().st_mtime]
    with contextlib.suppress(OSError):
        times.append((root / USED_NAME).stat().st_mtime)
    return max(times)


def _size(root: Path) -> int:
    """Bytes of every file under ``root``."""
    total = 0
    for folder, _, names in os.walk(root):
        for name in names:
            with contextlib.suppress(OSError):  # a temporary file renamed away meanwhile
                total += os.stat(os.path.join(folder, name)).st_size
    return total
