"""The fold process: a long-lived child that runs fold jobs, killed on timeout, replaced when it dies."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import root_mean_squared_error
from sklearn.model_selection import KFold

from service.records import submissions
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs.failure import classify
from worker.jobs.runtime import WorkerContext
from worker.process import fold_process
from worker.process.fold_process import FoldFailed, FoldProcess, FoldProcessDied, FoldProcessKilled

ROOT = Path(__file__).resolve().parents[3]


@pytest.fixture
def process() -> Iterator[FoldProcess]:
    runner = FoldProcess()
    yield runner
    runner.stop()


@pytest.fixture
def diabetes(ctx: WorkerContext) -> tuple[str, Any]:
    """A Ridge submission on diabetes (Efron et al. 2004, bundled with scikit-learn): 400 development rows."""
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", seed=3)
    return add_submission(ctx, dataset, config_document(dataset, "Ridge")), frame.iloc[:400]


def _start(process: FoldProcess) -> int:
    """Start the fold process and return its pid."""
    process.start()
    assert process.pid is not None
    return process.pid


def _slow_fold(*_args: Any) -> dict[str, Any]:
    time.sleep(60)
    return {}


def _gone(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as stat:
            return stat.read().rsplit(")", 1)[1].split()[0] in ("Z", "X")  # a zombie has stopped running
    except FileNotFoundError:
        return True


def test_folds_run_in_one_child_and_score_as_scikit_learn_does(
    ctx: WorkerContext, process: FoldProcess, diabetes: tuple[str, Any]
) -> None:
    sub_id, dev = diabetes
    child = _start(process)
    assert child != os.getpid()
    answers = [process.run_fold(sub_id, 0, f) for f in (0, 1)]
    assert [a["status"] for a in answers] == ["ok", "ok"] and process.pid == child  # one child, reused
    # Reference: scikit-learn's Ridge() fitted on the first split of KFold(5, shuffle=True,
    # random_state=3) -- the dataset's "kfold" plan with seed 3 is defined to be exactly that split --
    # and scored with its root_mean_squared_error.
    X, y = dev.drop(columns="target").to_numpy(), dev["target"].to_numpy()
    train, test = next(KFold(5, shuffle=True, random_state=3).split(X))
    expected = root_mean_squared_error(y[test], Ridge().fit(X[train], y[train]).predict(X[test]))
    row = next(r for r in submissions.fold_rows(ctx.engine, sub_id) if r["fold"] == 0)
    assert row["scores"]["rmse"] == pytest.approx(expected, rel=1e-12)


def test_an_error_in_a_fold_comes_back_with_its_traceback_and_the_child_stays(
    process: FoldProcess, diabetes: tuple[str, Any]
) -> None:
    sub_id, _dev = diabetes
    child = _start(process)
    with pytest.raises(FoldFailed, match="LookupError: no submission 'sub_nope'") as failure:
        process.run_fold("sub_nope", 0, 0)
    assert "Traceback" in str(failure.value) and "in the fold process" in str(failure.value)
    assert process.run_fold(sub_id, 0, 0)["status"] == "ok" and process.pid == child


def test_a_child_killed_mid_fold_fails_that_job_and_the_next_job_gets_a_new_child(
    process: FoldProcess, diabetes: tuple[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _dev = diabetes
    monkeypatch.setattr(fold_process, "run_fold", _slow_fold)  # what the child will run
    child = _start(process)
    # A SIGKILL from outside the worker, as the kernel's OOM killer sends: a memory failure, not a crash.
    threading.Timer(0.3, os.kill, (child, signal.SIGKILL)).start()
    with pytest.raises(FoldProcessKilled, match=r"killed by the operating system \(SIGKILL\), most likely out of"):
        process.run_fold(sub_id, 0, 0)
    assert process.pid is None and _gone(child)
    monkeypatch.undo()
    assert process.run_fold(sub_id, 0, 0)["status"] == "ok"
    assert process.pid not in (None, child)


def _killed_by_the_system(*_args: Any) -> dict[str, Any]:
    os.kill(os.getpid(), signal.SIGKILL)  # what the OOM killer does to the process using the most memory
    return {}


def test_a_fold_process_killed_by_the_system_is_a_memory_failure_naming_the_likely_cause(
    process: FoldProcess, diabetes: tuple[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _dev = diabetes
    monkeypatch.setattr(fold_process, "run_fold", _killed_by_the_system)  # what the child will run
    _start(process)
    with pytest.raises(FoldProcessKilled) as killed:
        process.run_fold(sub_id, 0, 0)
    loss = classify(killed.value, "fold 0 of repeat 0", timeout_seconds=3600, memory_limit_mib=4096)
    # Retried (the host may have been short for a moment); the last attempt's loss names memory, not a crash.
    assert (loss.cause, loss.retry) == ("memory_limit", True)
    assert loss.detail == ("fold 0 of repeat 0: the fold process was killed by the operating system (SIGKILL), "
                           "most likely out of memory; it was under its memory limit of 4096 MiB, so the host ran "
                           "out first")
    assert classify(killed.value, "fold 0 of repeat 0", 3600, 0).detail.endswith("most likely out of memory")


def test_a_fold_process_this_worker_kills_is_not_taken_for_the_system(
    process: FoldProcess, diabetes: tuple[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    """RQ's stop command kills the fold process through FoldProcess.kill: a stopped job, not a memory failure."""
    sub_id, _dev = diabetes
    monkeypatch.setattr(fold_process, "run_fold", _slow_fold)
    _start(process)
    threading.Timer(0.3, process.kill).start()
    with pytest.raises(FoldProcessDied, match="killed by SIGKILL") as died:
        process.run_fold(sub_id, 0, 0)
    assert not isinstance(died.value, FoldProcessKilled)
    assert classify(died.value, "fold 0 of repeat 0", 3600, 4096).cause == "crash"
    monkeypatch.undo()
    assert process.run_fold(sub_id, 0, 0)["status"] == "ok"  # the next job runs with no kill pending


def test_a_child_that_died_while_idle_is_replaced_before_the_next_job(
    process: FoldProcess, diabetes: tuple[str, Any]
) -> None:
    sub_id, _dev = diabetes
    child = _start(process)
    os.kill(child, signal.SIGKILL)
    time.sleep(0.2)
    assert process.run_fold(sub_id, 0, 0)["status"] == "ok" and process.pid != child


class Timeout(Exception):
    """Stands in for RQ's JobTimeoutException, which its SIGALRM handler raises the same way."""


def test_a_timeout_while_waiting_kills_the_fold(
    process: FoldProcess, diabetes: tuple[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _dev = diabetes
    monkeypatch.setattr(fold_process, "run_fold", _slow_fold)
    child = _start(process)

    def time_is_up(_signum: int, _frame: Any) -> None:
        raise Timeout

    previous = signal.signal(signal.SIGALRM, time_is_up)
    signal.setitimer(signal.ITIMER_REAL, 0.3)
    try:
        started = time.monotonic()
        with pytest.raises(Timeout):
            process.run_fold(sub_id, 0, 0)
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
    assert time.monotonic() - started < 5
    assert process.pid is None and _gone(child)  # the sleeping fold did not outlive its timeout


def test_a_child_that_grew_is_replaced_after_its_job(
    process: FoldProcess, diabetes: tuple[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _dev = diabetes
    kept: list[np.ndarray] = []
    real = fold_process.run_fold

    def hoarding_fold(*args: Any) -> dict[str, Any]:
        kept.append(np.ones(64 << 17))  # 64 MiB the child keeps
        return real(*args)

    monkeypatch.setattr(fold_process, "run_fold", hoarding_fold)
    monkeypatch.setattr(fold_process, "REPLACE_AFTER_GROWTH_BYTES", 32 << 20)
    child = _start(process)
    process.run_fold(sub_id, 0, 0)  # the first job settles the child's size
    assert process.pid == child
    process.run_fold(sub_id, 0, 1)  # 64 MiB more: over the allowance, so replaced after the job
    assert process.pid is None and child is not None and _gone(child)


def test_the_child_keeps_what_a_fold_freed_for_the_next_one(
    ctx: WorkerContext, process: FoldProcess, monkeypatch: pytest.MonkeyPatch
) -> None:
    def fold_with_a_big_copy(*_args: Any) -> dict[str, Any]:
        copy = np.ones(96 << 17)  # 96 MiB, freed when the fold returns
        return {"sum": float(copy[:10].sum())}

    monkeypatch.setattr(fold_process, "run_fold", fold_with_a_big_copy)
    before = _private_dirty(_start(process))
    assert process.run_fold("sub_x", 0, 0) == {"sum": 10.0}
    # By default glibc unmaps a freed 96 MiB array at once; kept, the pages stay the child's own
    # (written, so private to it) for the next fold to reuse.
    assert process.pid is not None and _private_dirty(process.pid) - before > 90 << 20


def _private_dirty(pid: int) -> int:
    with open(f"/proc/{pid}/smaps_rollup", encoding="ascii") as rollup:
        for line in rollup:
            if line.startswith("Private_Dirty:"):
                return int(line.split()[1]) * 1024
    raise AssertionError("no Private_Dirty line")


def test_the_child_dies_with_its_parent(tmp_path: Path) -> None:
    script = (
        "import os, sys\n"
        "from worker.process.fold_process import FoldProcess\n"
        "p = FoldProcess(); p.start(); print(p.pid, flush=True)\n"
        "os._exit(0)\n"  # the worker vanishes without stopping its child
    )
    out = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True, timeout=60,
                         check=True)
    child = int(out.stdout.split()[0])
    deadline = time.monotonic() + 10
    while not _gone(child):
        assert time.monotonic() < deadline, f"fold process {child} outlived its parent"
        time.sleep(0.05)
