"""The holdout step's deadline on the worker side: a development-row timing, and a watch that stops the step.

``service.gate.timing`` says what the deadline is and when the verdict is shown; here the holdout job
measures what the deadline is made of and enforces the step's limit.
"""

from __future__ import annotations

import os
import signal
import threading
import time
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

from worker.jobs import runtime
from worker.learning import scoring


def dev_predict_seconds(pipeline: Any, data: Any, rows: int, metrics: Any, classes: Any) -> float:
    """Time the refitted pipeline predicting as many development rows as the holdout holds (all, if fewer).

    Depends on the development rows alone, so the deadline made of it tells nothing of the sealed ones.
    """
    n = max(1, min(rows, len(data.y)))
    X = data.features_of(np.arange(n))
    started = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        scoring.predictions(pipeline, X, metrics, classes)  # not the name used on the sealed rows, below
    return time.perf_counter() - started


@contextmanager
def watch(on_limit: Callable[[], Any], seconds: float | None) -> Iterator[None]:
    """Call ``on_limit`` (store the attempt as failed) if the body is still running ``seconds`` from now.

    In a work horse (which ends with its job) the step is then stopped by killing the horse; the worker
    finds the outcome stored. Elsewhere (tests, a job run in-process) the late outcome loses to the stored
    failure: the first stored outcome is final. None: no limit but the job's timeout.
    """
    if seconds is None:
        yield
        return

    def passed() -> None:
        on_limit()
        if runtime.in_disposable_process():
            os.kill(os.getpid(), signal.SIGKILL)

    timer = threading.Timer(seconds, passed)
    timer.daemon = True
    timer.start()
    try:
        yield
    finally:
        timer.cancel()
