"""CPU seconds the stack's processes spent, by role, read from /proc/<pid>/stat around a run.

A worker's own time and that of the work horses it forked and reaped (a holdout job's horse, through
the children's times the kernel adds to the parent) are reported apart; its fold process, alive
throughout, is read on its own. The figure says where a burst's time goes when the CPUs, not waiting,
are what limit it.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

from peak_memory import children

TICKS = os.sysconf("SC_CLK_TCK")


WORKERS = "workers"
HORSES = "holdout horses"


def cpu_seconds(pid: int, *, own: bool = True, reaped_children: bool = True) -> float:
    """User + system seconds of ``pid`` (``own``) and of the children it reaped, or 0 when it is gone."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    utime, stime, cutime, cstime = (int(v) for v in fields[11:15])
    return (((utime + stime) if own else 0) + ((cutime + cstime) if reaped_children else 0)) / TICKS


def by_role(roles: Mapping[str, list[int]]) -> dict[str, float]:
    """CPU seconds per role; a worker's (``WORKERS``) reaped children count as ``HORSES``, its live
    children (its fold process) as 'fold processes'."""
    totals: dict[str, float] = {}
    for role, pids in roles.items():
        for pid in pids:
            if role != WORKERS:
                totals[role] = totals.get(role, 0.0) + cpu_seconds(pid)
                continue
            totals[role] = totals.get(role, 0.0) + cpu_seconds(pid, reaped_children=False)
            totals[HORSES] = totals.get(HORSES, 0.0) + cpu_seconds(pid, own=False)
            for child in children(pid):
                totals["fold processes"] = totals.get("fold processes", 0.0) + cpu_seconds(child)
    return totals


def difference(after: Mapping[str, float], before: Mapping[str, float]) -> dict[str, float]:
    return {role: after[role] - before.get(role, 0.0) for role in after}
