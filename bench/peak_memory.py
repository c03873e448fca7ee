"""Peak memory of the workers and of the processes they fork, while a submission runs.

Sampled every 20 ms from /proc. Each worker's own peak is its VmHWM. For a child -- a worker's
long-lived fold process, or the work horse forked for one holdout job -- the figure that matters is
what its job added beyond where the process started:

- a fold process alive when watching starts has its VmHWM reset to its current resident size
  (``echo 5 > /proc/<pid>/clear_refs``, Linux >= 4.0), which is its baseline; its growth is its VmHWM
  afterwards minus that baseline;
- a child first seen while watching (a holdout horse, or a fold process that replaced one) starts as
  a copy of its worker, so its baseline is the smaller of the worker's resident size and its own when
  it is first seen (the smaller, so the growth is not understated), and its growth is its own VmHWM
  minus that. A child that ends between two samples is missed, and so are its
  last few milliseconds.

A forked child's resident size counts the pages it shares with its worker, so its baseline does too;
the growth is what the job made resident on top. That includes the pages of the development rows'
memory-mapped file the job touched (file-backed page cache, shared with every process reading the
file and dropped first under memory pressure), so the private part is reported too: the largest
RssAnon sampled beyond the one at the baseline (sampled, so a peak between samples can escape it).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path


def status_kib(pid: int, field_name: str) -> int | None:
    """One field of /proc/<pid>/status in KiB (VmRSS, VmHWM), or None when the process is gone."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(field_name + ":"):
                return int(line.split()[1])
    except (OSError, ValueError):
        return None
    return None


def children(pid: int) -> list[int]:
    try:
        return [int(p) for p in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def reset_peak(pid: int) -> bool:
    """Reset a process's VmHWM to its current resident size; False when the kernel would not."""
    try:
        Path(f"/proc/{pid}/clear_refs").write_text("5")
    except OSError:
        return False
    return True


@dataclass
class ChildPeak:
    kind: str  # "fold process" (alive when watching started) or "forked during the run"
    baseline_kib: int
    baseline_anon_kib: int
    peak_kib: int = 0
    peak_anon_kib: int = 0

    @property
    def growth_kib(self) -> int:
        return max(0, self.peak_kib - self.baseline_kib)

    @property
    def anon_growth_kib(self) -> int:
        return max(0, self.peak_anon_kib - self.baseline_anon_kib)


@dataclass
class PeakMemory:
    """Highest VmHWM of the workers, and each child's peak beyond its baseline."""

    worker_pids: list[int]
    interval: float = 0.02
    worker_kib: int = 0
    child_peaks: dict[int, ChildPeak] = field(default_factory=dict)  # this watch's
    earlier: list[ChildPeak] = field(default_factory=list)  # the children of earlier watches
    _stop: threading.Event = field(default_factory=threading.Event)

    def _all(self) -> list[ChildPeak]:
        return [*self.earlier, *self.child_peaks.values()]

    @property
    def horse_kib(self) -> int:
        return max((c.peak_kib for c in self._all()), default=0)

    def growth_kib(self, kind: str) -> int:
        """The largest growth beyond baseline among children of ``kind``, over every watch."""
        return max((c.growth_kib for c in self._all() if c.kind == kind), default=0)

    def anon_growth_kib(self, kind: str) -> int:
        """The largest private (RssAnon) growth beyond baseline among children of ``kind``."""
        return max((c.anon_growth_kib for c in self._all() if c.kind == kind), default=0)

    def count(self, kind: str) -> int:
        return sum(1 for c in self._all() if c.kind == kind)

    def _start(self) -> None:
        self.earlier.extend(self.child_peaks.values())
        self.child_peaks = {}
        for pid in self.worker_pids:
            for child in children(pid):
                if reset_peak(child):
                    self.child_peaks[child] = ChildPeak("fold process", status_kib(child, "VmRSS") or 0,
                                                        status_kib(child, "RssAnon") or 0)

    def _sample(self) -> None:
        for pid in self.worker_pids:
            self.worker_kib = max(self.worker_kib, status_kib(pid, "VmHWM") or 0)
            for child in children(pid):
                peak = self.child_peaks.get(child)
                if peak is None:
                    baseline = min(status_kib(pid, "VmRSS") or 0, status_kib(child, "VmRSS") or 0)
                    anon = min(status_kib(pid, "RssAnon") or 0, status_kib(child, "RssAnon") or 0)
                    peak = self.child_peaks[child] = ChildPeak("forked during the run", baseline, anon)
                peak.peak_kib = max(peak.peak_kib, status_kib(child, "VmHWM") or 0)
                peak.peak_anon_kib = max(peak.peak_anon_kib, status_kib(child, "RssAnon") or 0)

    def _loop(self) -> None:
        while not self._stop.is_set():
            self._sample()
            time.sleep(self.interval)

    @contextmanager
    def watching(self) -> Iterator[PeakMemory]:
        self._start()
        thread = threading.Thread(target=self._loop, daemon=True)
        thread.start()
        try:
            yield self
        finally:
            self._stop.set()
            thread.join()
            self._stop.clear()
