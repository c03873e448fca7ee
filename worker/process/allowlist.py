"""The jobs a sealfold worker agrees to run: allow-listed functions and callbacks, read as JSON.

``AllowListedJob`` resolves only the dotted names in ``worker.jobs.ALLOWED_JOBS`` (never an instance
method) and no callback at all, so nothing in Redis can make a worker import anything else; ``func_name``
and ``request_id`` read a job's function name and the id of the API request that enqueued it without
failing on a job sealfold did not write.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from contextlib import AbstractContextManager
from typing import Any

from rq.exceptions import DeserializationError
from rq.job import Job
from rq.utils import import_attribute

from worker.jobs import ALLOWED_JOBS

log = logging.getLogger(__name__)

# Callbacks a job may name; sealfold's own jobs use none, so any name is refused.
ALLOWED_CALLBACKS: frozenset[str] = frozenset()


class RefusedJob(Exception):
    """A job named a function or callback this worker does not run."""


class AllowListedJob(Job):
    """An RQ job that resolves only allow-listed function names, never an instance method.

    ``keepalive``, set by the worker for a job it runs in its own process, wraps the job function's
    run (``perform``) and nothing after it.
    """

    keepalive: Callable[[], AbstractContextManager[None]] | None = None

    def perform(self) -> Any:
        if self.keepalive is None:
            return super().perform()
        with self.keepalive():
            return super().perform()

    @property
    def func(self) -> Callable[..., Any]:
        name = self.func_name
        refused = self.instance is not None or name not in ALLOWED_JOBS
        callbacks = [n for n in (self._success_callback_name, self._failure_callback_name,
                                 self._stopped_callback_name) if n and n not in ALLOWED_CALLBACKS]
        if refused or callbacks:
            self.retries_left = 0  # a retry would be refused the same way
            what = f"callback(s) {callbacks!r}" if not refused else f"function {name!r}"
            raise RefusedJob(f"job {self.id} names {what}, which this worker does not run; it runs only "
                             f"{', '.join(sorted(ALLOWED_JOBS))}")
        assert name is not None
        function: Callable[..., Any] = import_attribute(name)
        return function

    @property
    def success_callback(self) -> Any:
        return self._allowed_callback(self._success_callback_name, lambda: super(AllowListedJob, self)
                                      .success_callback)

    @property
    def failure_callback(self) -> Any:
        return self._allowed_callback(self._failure_callback_name, lambda: super(AllowListedJob, self)
                                      .failure_callback)

    @property
    def stopped_callback(self) -> Any:
        return self._allowed_callback(self._stopped_callback_name, lambda: super(AllowListedJob, self)
                                      .stopped_callback)

    @staticmethod
    def _allowed_callback(name: str | None, resolve: Callable[[], Any]) -> Any:
        if not name:
            return None
        if name not in ALLOWED_CALLBACKS:
            log.warning("ignoring callback %r: not on the worker's allow-list", name)
            return None
        return resolve()


def func_name(job: Job) -> str | None:
    """The job's function name, or None when its data cannot be read (a job not written by sealfold)."""
    try:
        return job.func_name
    except DeserializationError:
        return None


def request_id(job: Job) -> str | None:
    """The id of the API request that enqueued ``job``, when its meta names one and can be read."""
    try:
        meta = job.meta
    except DeserializationError:
        return None
    value = meta.get("request_id") if isinstance(meta, dict) else None
    return value if isinstance(value, str) else None
