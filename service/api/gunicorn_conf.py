"""gunicorn settings for the API: ``gunicorn -c python:service.api.gunicorn_conf 'service.app:create_app()'``.

With ``PROMETHEUS_MULTIPROC_DIR`` set, each gunicorn worker writes its HTTP samples to files there and
``/metrics`` sums them over all workers. The directory is emptied when the master starts (samples of an
earlier run would be counted again), and a worker that exits has its live gauges removed.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path
from typing import Any

from prometheus_client import multiprocess

from service.api.telemetry import MULTIPROC_ENV


def on_starting(server: Any) -> None:
    """Empty (or create) the multiprocess directory before any worker starts."""
    path = os.environ.get(MULTIPROC_ENV)
    if path:
        shutil.rmtree(path, ignore_errors=True)
        Path(path).mkdir(parents=True, exist_ok=True)


def child_exit(server: Any, worker: Any) -> None:
    """Drop an exited worker's live samples."""
    if os.environ.get(MULTIPROC_ENV):
        multiprocess.mark_process_dead(worker.pid)
