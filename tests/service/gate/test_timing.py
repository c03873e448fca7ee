"""The holdout step's deadline and the publication time: fixed from public figures, blind to the step's duration.

Pure functions; the durations are invented round figures (no data is involved). What is checked is the
channel's capacity in the sense of Shannon (1948): the number of distinct publication times a step's
duration can produce, whose base-2 logarithm bounds the bits they carry.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

from service.gate import timing
from service.settings import Settings

T0 = datetime(2026, 1, 5, 9, 0, tzinfo=UTC)


def test_the_deadline_is_a_margin_over_the_development_timing_on_the_pads_grid() -> None:
    # 4 x 2.0 s + 10 s = 18 s, rounded up to a multiple of the 10 s pad: 20 s.
    assert timing.deadline_seconds(2.0, 10.0, 3600.0) == 20.0
    assert timing.deadline_seconds(0.0, 10.0, 3600.0) == 10.0
    assert timing.deadline_seconds(2.0, 10.0, 12.0) == 12.0  # never past what is left of the job's timeout
    assert timing.deadline_seconds(2.0, 0.0, 3600.0) is None  # the deadline turned off
    # The step itself stops half a pad early, leaving the verdict job the rest.
    assert timing.step_seconds(20.0, 10.0) == 15.0
    assert timing.step_seconds(None, 10.0) is None


def test_a_verdict_ready_before_its_deadline_is_shown_at_the_deadline() -> None:
    deadline = T0 + timedelta(seconds=20)
    for ready in (1.0, 7.5, 19.999, 20.0):
        assert timing.publish_at(deadline, T0 + timedelta(seconds=ready), 10.0) == deadline
    # Later (the summary still ran): on the pad's grid after the deadline.
    assert timing.publish_at(deadline, T0 + timedelta(seconds=20.5), 10.0) == T0 + timedelta(seconds=30)
    assert timing.publish_at(deadline, T0 + timedelta(seconds=41), 10.0) == T0 + timedelta(seconds=50)
    assert timing.publish_at(None, T0, 10.0) == T0  # no deadline: as it happened


def _distinct_publications(pad: float, durations: list[float]) -> int:
    """How many publication times the step's durations produce, the rest held equal (summary done at 2 s)."""
    opened, deadline_s = T0, timing.deadline_seconds(0.5, pad, 3600.0)
    deadline = None if deadline_s is None else opened + timedelta(seconds=deadline_s)
    limit = timing.step_seconds(deadline_s, pad)
    shown = set()
    for duration in durations:
        stored = duration if limit is None else min(duration, limit)  # stopped at its limit, stored failed
        ready = opened + timedelta(seconds=max(2.0, stored) + 0.2)  # the verdict job's own 0.2 s
        shown.add(timing.publish_at(deadline, ready, pad))
    return len(shown)


def test_a_timing_attacker_reads_log2_of_the_durations_without_a_deadline_and_nothing_with_one() -> None:
    # A submitter whose pipeline is fast or slow on the sealed rows as they hold a value or not, choosing
    # among 16 durations (a 4-bit question), reads the publication time.
    durations = [0.1 * 2 ** k for k in range(16)]  # 0.1 s .. about 55 min
    without = _distinct_publications(0.0, durations)
    pad = Settings().holdout_pad_seconds  # the deployment's default
    with_pad = _distinct_publications(pad, durations)
    print(f"\n[timing attacker] 16 sealed-dependent durations: {math.log2(without):.2f} bits per submission "
          f"without a deadline, {math.log2(with_pad):.2f} with the default {pad:g} s pad")
    assert math.log2(without) > 3.0
    assert with_pad == 1  # one publication time whatever the duration: 0 bits beyond the counted answer


def test_a_verdict_not_yet_published_reads_as_running() -> None:
    row = {"id": "sub_x", "state": "succeeded", "verdict": {"decision": "pass"}, "finished_at": T0,
           "published_at": T0 + timedelta(seconds=5), "error": None, "failure_cause": None}
    early = timing.shown_as(row, T0 + timedelta(seconds=4))
    assert early["held_back"] and early["state"] == "running"
    assert early["verdict"] is None and early["finished_at"] is None
    late = timing.shown_as(row, T0 + timedelta(seconds=5))
    assert not late["held_back"] and late["state"] == "succeeded" and late["verdict"] == {"decision": "pass"}
    naive = {**row, "published_at": (T0 + timedelta(seconds=5)).replace(tzinfo=None)}  # as SQLite returns it
    assert timing.shown_as(naive, T0 + timedelta(seconds=4))["held_back"]
    assert not timing.shown_as({**row, "published_at": None}, T0)["held_back"]
