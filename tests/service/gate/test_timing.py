"""The holdout step's deadline and the publication time: fixed from public figures, blind to the step's duration.

Pure functions; the durations are invented round figures (no data is involved). What is checked is the
channel's capacity in the sense of Shannon (1948): the number of distinct publication times a step's
duration can produce, whose base-2 logarithm bounds the bits they carry.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import pytest

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


def test_the_prompt_time_is_a_tighter_margin_never_past_the_deadline() -> None:
    assert timing.prompt_seconds(0.01, 0.1, 2.0) == pytest.approx(0.12)  # 2 x 0.01 s + 0.1 s
    assert timing.prompt_seconds(3.0, 0.1, 2.0) == 2.0  # never later than the deadline
    assert timing.prompt_seconds(0.01, 0.0, 2.0) is None  # turned off
    assert timing.prompt_seconds(0.01, 0.1, None) is None  # no deadline, no prompt time


def test_a_verdict_is_shown_at_the_prompt_time_or_after_the_summary_or_as_without_one_and_then_counted() -> None:
    prompt, deadline = T0 + timedelta(seconds=0.2), T0 + timedelta(seconds=2)

    def shown(ready: float, scored: float, summarized: float) -> timing.Moment:
        return timing.moment(prompt=prompt, deadline=deadline, ready=T0 + timedelta(seconds=ready),
                             scored=T0 + timedelta(seconds=scored), summarized=T0 + timedelta(seconds=summarized),
                             pad_seconds=1.0, prompt_pad_seconds=0.1)

    # Given half a prompt pad before it (0.15 s): at the prompt time, whatever the step took.
    assert shown(0.15, 0.1, 0.05) == timing.Moment(prompt, False)
    assert shown(0.12, 0.01, 0.1) == timing.Moment(prompt, False)
    # The verdict waited on the summary, stored after the holdout outcome: half a prompt pad after its own time.
    assert shown(0.93, 0.05, 0.9) == timing.Moment(T0 + timedelta(seconds=0.98), False)
    # It waited on the sealed step, past the prompt time: as with the deadline alone, and late.
    assert shown(0.31, 0.3, 0.05) == timing.Moment(deadline, True)
    # However long the step took, when the summary came after it: set by the summary.
    assert shown(0.93, 0.3, 0.9) == timing.Moment(T0 + timedelta(seconds=0.98), False)
    assert shown(2.3, 2.2, 0.05) == timing.Moment(T0 + timedelta(seconds=3), True)  # the deadline's grid
    # No prompt time fixed (turned off, or an older claim): the deadline as before, never late.
    assert timing.moment(prompt=None, deadline=deadline, ready=T0, scored=T0, summarized=None, pad_seconds=1.0,
                         prompt_pad_seconds=0.1) == timing.Moment(deadline, False)


def _outcomes(durations: list[float], summarized: float) -> set[tuple[datetime, bool]]:
    """What a step's durations produce under the default pad and prompt: (publication time, late) pairs,
    the rest held equal (the summary stored at ``summarized`` s, the verdict job's own 0.05 s)."""
    settings = Settings()
    pad, prompt_pad = settings.holdout_pad_seconds, settings.holdout_prompt_seconds
    dev = 0.005  # the development-row prediction time, seconds
    deadline_s = timing.deadline_seconds(dev, pad, 3600.0)
    prompt_s = timing.prompt_seconds(dev, prompt_pad, deadline_s)
    assert deadline_s is not None and prompt_s is not None
    limit = timing.step_seconds(deadline_s, pad)
    assert limit is not None
    seen = set()
    for duration in durations:
        stored = min(duration, limit)  # stopped at its limit, stored failed
        ready = max(summarized, stored) + 0.05
        moment = timing.moment(prompt=T0 + timedelta(seconds=prompt_s), deadline=T0 + timedelta(seconds=deadline_s),
                               ready=T0 + timedelta(seconds=ready), scored=T0 + timedelta(seconds=stored),
                               summarized=T0 + timedelta(seconds=summarized), pad_seconds=pad,
                               prompt_pad_seconds=prompt_pad)
        seen.add((moment.at, moment.late))
    return seen


def test_with_a_prompt_time_the_attacker_reads_one_bit_at_most_and_pays_a_unit_for_it() -> None:
    durations = [0.001 * 2 ** k for k in range(16)]  # 1 ms .. about 33 s
    for summarized in (0.01, 0.5, 3.0):  # the folds done before the step, during it, long after it
        seen = _outcomes(durations, summarized)
        on_time = {at for at, late in seen if not late}
        print(f"\n[timing attacker, prompt time] summary at {summarized:g} s: {len(seen)} outcome(s) from 16 "
              f"durations, {len(on_time)} of them free, the rest counted as one more query")
        assert len(on_time) <= 1  # what is not counted is one time, set by public figures
        assert len({at for at, late in seen if late}) <= 1  # late: the deadline (a step stopped at its limit too)
        assert len(seen) <= 2  # one bit at most, and reading it costs a unit


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
