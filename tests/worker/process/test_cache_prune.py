"""A fetching worker's cache is kept under its cap: least recently used datasets go first, never one a job
may still be reading, and a prune never runs while a job marks a dataset used."""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

from worker.process.cache_prune import LOCK_NAME, PRUNED_PREFIX, USED_NAME, cache_lock, mark_used, prune

MIB = 1 << 20
NOW = 2_000_000_000.0
IDLE = 7_260.0  # the default longest job timeout (the holdout's, 2 x 3,600 s) plus 60 s


def _dataset(cache: Path, ds_id: str, mib: int, used_seconds_ago: float) -> Path:
    root = cache / ds_id
    (root / "folds").mkdir(parents=True)
    (root / "numeric.npy").write_bytes(b"\0" * (mib * MIB - 100))
    (root / "folds" / "kfold-5-0.npy").write_bytes(b"\1" * 100)  # files below the top count too
    stamp = NOW - used_seconds_ago
    (root / USED_NAME).touch()
    for path in (root / USED_NAME, root):
        os.utime(path, (stamp, stamp))
    return root


def _left(cache: Path) -> list[str]:
    return sorted(p.name for p in cache.iterdir() if p.name != LOCK_NAME)


def test_the_datasets_used_longest_ago_go_first_until_the_cache_is_under_its_cap(tmp_path: Path) -> None:
    for name, age in (("old", 30 * 86_400), ("older", 40 * 86_400), ("recent", 9_000), ("new", 0)):
        _dataset(tmp_path, name, 2, age)
    removed = prune(tmp_path, "new", 5 * MIB, IDLE, NOW)
    assert [r.dataset_id for r in removed] == ["older", "old"]  # 8 MiB -> 4 MiB: "recent" may stay
    assert all(r.size_bytes == 2 * MIB for r in removed)
    assert _left(tmp_path) == ["new", "recent"]


def test_a_dataset_a_job_may_still_read_stays_even_above_the_cap(tmp_path: Path) -> None:
    _dataset(tmp_path, "in-use", 3, IDLE - 60)  # asked for by a job that may run until its timeout
    _dataset(tmp_path, "fetching", 3, 10 * 86_400)  # the dataset being fetched is never removed
    _dataset(tmp_path, "idle", 3, IDLE + 60)
    assert [r.dataset_id for r in prune(tmp_path, "fetching", 1 * MIB, IDLE, NOW)] == ["idle"]
    assert _left(tmp_path) == ["fetching", "in-use"]


def test_nothing_goes_while_the_cache_is_under_its_cap(tmp_path: Path) -> None:
    for name in ("a", "b"):
        _dataset(tmp_path, name, 1, 100 * 86_400)
    assert prune(tmp_path, "b", 2 * MIB, IDLE, NOW) == []
    assert _left(tmp_path) == ["a", "b"]


def test_a_cache_from_before_marks_is_aged_by_its_directories(tmp_path: Path) -> None:
    old = _dataset(tmp_path, "unmarked", 2, 50 * 86_400)
    (old / USED_NAME).unlink()
    os.utime(old, (NOW - 50 * 86_400,) * 2)
    _dataset(tmp_path, "current", 2, 0)
    assert [r.dataset_id for r in prune(tmp_path, "current", 3 * MIB, IDLE, NOW)] == ["unmarked"]


def test_a_half_removed_dataset_left_by_a_dead_pruner_is_removed(tmp_path: Path) -> None:
    _dataset(tmp_path, f"{PRUNED_PREFIX}gone-1234abcd", 1, 0)
    _dataset(tmp_path, "kept", 1, 0)
    assert prune(tmp_path, "kept", 10 * MIB, IDLE, NOW) == []
    assert _left(tmp_path) == ["kept"]


def test_marking_a_dataset_used_waits_for_a_prune_under_way(tmp_path: Path) -> None:
    # flock locks belong to open file descriptions, so two threads of one process exclude each other too.
    marked = threading.Event()

    def mark() -> None:
        mark_used(tmp_path, "ds")
        marked.set()

    with cache_lock(tmp_path, exclusive=True):
        marker = threading.Thread(target=mark)
        marker.start()
        assert not marked.wait(0.3)
        assert not (tmp_path / "ds").exists()  # the mark is made after the prune, never during it
    marker.join(10)
    assert marked.is_set() and (tmp_path / "ds" / USED_NAME).is_file()
    assert time.time() - (tmp_path / "ds" / USED_NAME).stat().st_mtime < 60
