"""The worker's process context: settings and records engine, installed once at start-up.

RQ calls job functions with JSON arguments only, so the functions find their engine and settings
here. ``run_worker`` installs the context before the first fork; tests install their own.
"""

from __future__ import annotations

import io
import threading
from collections.abc import Callable, Collection, Iterator, Mapping
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from sqlalchemy import Engine

from service.records import datasets, submissions
from service.settings import Settings

ENDED_STATES: tuple[str, ...] = ("failed", "canceled")


@dataclass(frozen=True)
class WorkerContext:
    """What every job needs besides its arguments."""

    settings: Settings
    engine: Engine


class _Slot:
    """Holds the installed context; a class attribute, so there is no import-time connection."""

    context: WorkerContext | None = None
    fold_runner: FoldRunner | None = None
    data_source: DataSource | None = None
    disposable: bool = False  # this process is a work horse that ends with its job


class FoldRunner(Protocol):
    """Runs a fold job elsewhere and returns its answer (``worker.process.fold_process.FoldProcess``)."""

    def run_fold(self, submission_id: str, repeat: int, fold: int) -> dict[str, Any]: ...


class DataSource(Protocol):
    """Brings a dataset's files into this worker's data dir (``worker.process.fetched_data.DataFetcher``)."""

    def development(self, ds_id: str) -> list[str]: ...

    def sealed(self, ds_id: str) -> Path: ...

    def per_example(self, ds_id: str, submission_id: str) -> bytes | None: ...

    def publish_per_example(self, ds_id: str, submission_id: str, path: Path) -> None: ...


def install_data_source(source: DataSource | None) -> None:
    """Make ``source`` fetch dataset files before jobs open them (None: the data dir is the shared volume)."""
    _Slot.data_source = source


def ensure_development(ds_id: str) -> None:
    """Make the development files of ``ds_id`` readable here (a no-op on a shared data dir)."""
    if _Slot.data_source is not None:
        _Slot.data_source.development(ds_id)


@contextmanager
def sealed_file(ds_id: str) -> Iterator[Path | None]:
    """The sealed holdout of ``ds_id`` for the holdout job alone to read: None on a shared data dir (the
    store's own file); a worker without it fetches a copy of the job's own and removes it when the block
    ends, however it ends, so no copy of the sealed rows outlives the job that reads them."""
    if _Slot.data_source is None:
        yield None
        return
    path = _Slot.data_source.sealed(ds_id)
    try:
        yield path
    finally:
        path.unlink(missing_ok=True)


def per_example_source(ds_id: str, submission_id: str, path: Path) -> Path | io.BytesIO | None:
    """Where to read a submission's per-example holdout values: ``path`` on a shared data dir (None when no
    file is there); on a worker without it, the API's copy in memory (None when the API has none)."""
    if _Slot.data_source is None:
        return path if path.exists() else None
    data = _Slot.data_source.per_example(ds_id, submission_id)
    return None if data is None else io.BytesIO(data)


def publish_per_example(ds_id: str, submission_id: str, path: Path) -> None:
    """Give the API the per-example holdout values just written at ``path``, then remove them here: a worker
    without the shared disk reads the API's copy (``per_example_source``). A no-op on a shared data dir."""
    if _Slot.data_source is not None:
        try:
            _Slot.data_source.publish_per_example(ds_id, submission_id, path)
        finally:
            path.unlink(missing_ok=True)


def install(ctx: WorkerContext) -> None:
    """Make ``ctx`` the context of this process (and of the work horses it forks)."""
    _Slot.context = ctx


def uninstall() -> None:
    """Forget the installed context and fold runner (tests)."""
    _Slot.context = None
    _Slot.fold_runner = None
    _Slot.data_source = None


def install_fold_runner(runner: FoldRunner | None) -> None:
    """Make ``runner`` run this process's fold jobs (None: run them here)."""
    _Slot.fold_runner = runner


def fold_runner() -> FoldRunner | None:
    """Return the installed fold runner, or None when fold jobs run in this process."""
    return _Slot.fold_runner


def current() -> WorkerContext:
    """Return the installed context; a job run outside a started worker is a programming error."""
    if _Slot.context is None:
        raise RuntimeError("no worker context installed; start the worker with worker.process.main.run_worker "
                           "or call worker.jobs.runtime.install() first")
    return _Slot.context


def mark_disposable() -> None:
    """Say that this process ends with its one job (a work horse): a job may then kill it to stop its work."""
    _Slot.disposable = True


def in_disposable_process() -> bool:
    """Whether this process ends with its job (``mark_disposable``)."""
    return _Slot.disposable


def after_fork() -> None:
    """Drop the pooled DB connections inherited from the parent without closing them under it.

    Also forgets the parent's fold runner: a child runs fold jobs itself.

    A forked work horse must not reuse the parent's sockets (two processes on one connection
    corrupt it); ``dispose(close=False)`` gives the child a fresh pool and leaves the parent's alone.
    """
    if _Slot.context is not None:
        _Slot.context.engine.dispose(close=False)
    _Slot.fold_runner = None  # the parent's handle on its fold process is not the child's to use


@dataclass(frozen=True)
class Work:
    """The submission a job works on and its dataset's internal row."""

    submission: dict[str, Any]
    dataset: dict[str, Any]


@dataclass(frozen=True)
class Skip:
    """The answer of a job that leaves its submission alone, because the submission's chain is over."""

    answer: dict[str, Any]


def submission_to_work_on(
    ctx: WorkerContext, submission_id: str, *, skip: Collection[str] = ENDED_STATES,
    echo: Mapping[str, Any] | None = None,
) -> Work | Skip:
    """Load a submission and its dataset for a job, or answer ``Skip`` when its state is in ``skip``.

    A missing submission or dataset is an error (the job retries; the reconciler never enqueues
    unknown ids and datasets are never deleted); a failed or canceled one is skipped, so late jobs of
    a finished chain do nothing. Fold and summary jobs also skip a succeeded submission; the holdout
    and verdict jobs answer a succeeded one themselves ("already scored", "already judged"). ``echo``
    is repeated in the skip answer (a fold's repeat and fold).
    """
    sub = submissions.get(ctx.engine, submission_id)
    if sub is None:
        raise LookupError(f"no submission {submission_id!r} in the records DB")
    if sub["state"] in skip:
        return Skip({"submission_id": submission_id, **(echo or {}), "skipped": sub["state"]})
    dataset = datasets.get_internal(ctx.engine, sub["dataset_id"])
    if dataset is None:
        raise LookupError(f"submission {submission_id} refers to dataset {sub['dataset_id']!r}, which is gone")
    ensure_development(str(dataset["id"]))
    return Work(sub, dataset)


@contextmanager
def repeating(every: float, action: Callable[[], object], name: str) -> Iterator[None]:
    """Run ``action`` from a thread every ``every`` seconds while the body runs; stop before leaving.

    A heartbeat that raised is retried at the next interval (``action`` reports its own errors):
    one missed beat must not end the beats. The thread is joined on the way out, so no beat lands
    after the body has finished.
    """
    stop = threading.Event()

    def beat() -> None:
        while not stop.wait(every):
            with suppress(Exception):
                action()

    thread = threading.Thread(target=beat, name=name, daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join()
