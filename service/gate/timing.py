"""When the outcome of a holdout step may be shown: a time fixed in advance, so its duration tells nothing.

How long a pipeline takes on the sealed rows can depend on what they hold (a transform slow on some
values, a refit that fails fast or succeeds slowly), and every time a submitter can read -- a finished
time, a verdict's time, when a budget unit was spent, the moment the state changes -- would carry it.
So the holdout job fixes a deadline before the submitted pipeline meets the sealed rows, from what
depends on the development rows only (``deadline_seconds``: the same pipeline's prediction time on as
many development rows, with a margin), and the sealed step's outcome counts only if it is stored by then:
a step still running half a pad before the deadline (``step_seconds``) is stopped and stored as a failed
attempt (one counted query, told in the same fixed words as any failure), leaving the verdict job the
other half to be given by the deadline. The verdict's times are then ``publish_at``: the deadline, or, when the
verdict could only be given later (the cross-validation summary still running), the verdict's own time
rounded up to a grid of the pad from the deadline. Until that moment readers see the submission as running
(``shown_as``), and every timestamp a submitter reads of the verdict, the release and the budget unit it
spent is that moment.

A deadline generous enough that an honest step on a busy host meets it is long for a small table (a pad
of a second). So the holdout job also fixes a *prompt time*, the same way but tighter (``prompt_seconds``:
twice the development-row prediction time plus ``holdout_prompt_seconds``, 75 ms by default),
and ``moment`` decides when a verdict is shown: at the prompt time when it is given by then (half a prompt
pad before it); half a prompt pad after its own time when it waited on the cross-validation summary, stored
after the holdout outcome (a time the sealed rows do not set, however long the step took); and otherwise --
the verdict waited on the sealed step and missed the prompt time -- as without a prompt time (the deadline,
or its grid), the lateness counted as one more holdout query against the submitter's and the team's budget.
Being late tells one bit, and that bit is counted like any other answer.

What remains: the verdict's time still depends on the summary and on queueing, which the sealed rows do
not set (save that the holdout process shares the machine with the folds); and an attempt killed with its
whole worker (no deadline watchdog left) is settled when the next job finds its claim stale, at most once
per submission, after the attempt was already counted. See README.md, "Timing".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

# The deadline is this many times the development-row prediction time plus the pad (the setting
# ``holdout_pad_seconds``), rounded up to a multiple of the pad. A margin of a few times a measured
# duration is common practice for timeouts; the factor is ours.
MARGIN = 4.0


def deadline_seconds(dev_predict_seconds: float, pad_seconds: float, timeout_left_seconds: float) -> float | None:
    """Seconds the sealed step may take, fixed from a development-row timing before the seal is opened.

    ``dev_predict_seconds``: the refitted pipeline predicting as many development rows as the holdout
    holds (as many as there are, when fewer). Capped by what is left of the job's own timeout, so the
    deadline, not the timeout, is what ends a slow step. None when ``pad_seconds`` is 0 (the deployment
    turned the deadline off: the job's timeout bounds the step and times are shown as they are).
    """
    if pad_seconds <= 0:
        return None
    wanted = MARGIN * max(dev_predict_seconds, 0.0) + pad_seconds
    wanted = math.ceil(wanted / pad_seconds) * pad_seconds
    return max(1.0, min(wanted, timeout_left_seconds))


# The prompt time is this many times the development-row prediction time plus ``holdout_prompt_seconds``:
# tighter than the deadline's margin, because missing it costs one counted query and a later answer, not a
# failed attempt. The factor is ours.
PROMPT_MARGIN = 2.0


def prompt_seconds(dev_predict_seconds: float, prompt_pad_seconds: float,
                   deadline_seconds: float | None) -> float | None:
    """Seconds after opening the seal at which a verdict given by then is shown; None: no prompt time.

    None when the deadline is off or ``prompt_pad_seconds`` is 0 (every verdict waits for the deadline).
    Never later than the deadline.
    """
    if deadline_seconds is None or prompt_pad_seconds <= 0:
        return None
    return min(PROMPT_MARGIN * max(dev_predict_seconds, 0.0) + prompt_pad_seconds, deadline_seconds)


@dataclass(frozen=True)
class Moment:
    """When a verdict is shown, and whether showing it then is one more counted answer (it came late)."""

    at: datetime
    late: bool


def moment(*, prompt: datetime | None, deadline: datetime | None, ready: datetime, scored: datetime | None,
           summarized: datetime | None, pad_seconds: float, prompt_pad_seconds: float) -> Moment:
    """The moment a verdict given at ``ready`` is shown, from the times fixed before the seal was opened.

    ``scored``: when the holdout outcome was stored; ``summarized``: when the cross-validation summary was.
    With no prompt time, ``publish_at`` the deadline, never late. With one:

    - given half a prompt pad before it: the prompt time, whatever the step took;
    - the summary stored after the holdout outcome (the verdict waited on the folds, not on the sealed
      step): half a prompt pad after ``ready``, a time set by the summary and the queues, the half pad
      leaving the verdict's own work time to be stored by then;
    - otherwise (the step, or the verdict waiting on it, past the prompt time): as without a prompt time,
      and late: that it came late depends on the sealed step, so it is counted as one more query.
    """
    if prompt is None:
        return Moment(publish_at(deadline, ready, pad_seconds), False)
    allowance = timedelta(seconds=0.5 * prompt_pad_seconds)
    if ready <= prompt - allowance:
        return Moment(prompt, False)
    if scored is not None and summarized is not None and summarized > scored:
        return Moment(ready + allowance, False)
    return Moment(publish_at(deadline, ready, pad_seconds), True)


def step_seconds(deadline_seconds: float | None, pad_seconds: float) -> float | None:
    """How long the step on the sealed rows may run: up to half a pad before the deadline.

    The other half is the verdict job's, so that a step stopped at its limit is judged before the deadline
    and shown at it, like any other outcome.
    """
    if deadline_seconds is None:
        return None
    return max(0.5 * deadline_seconds, deadline_seconds - 0.5 * pad_seconds)


def publish_at(deadline: datetime | None, ready: datetime, grid_seconds: float) -> datetime:
    """The moment a verdict given at ``ready`` may be shown: the deadline, or ``ready`` on the grid after it.

    No deadline (an attempt that never met the sealed rows: its refit failed; the deadline turned off; a
    record from before deadlines): ``ready`` itself, which then depends on the development rows alone.
    """
    if deadline is None or grid_seconds <= 0:
        return ready if deadline is None else max(ready, deadline)
    if ready <= deadline:
        return deadline
    steps = math.ceil((ready - deadline).total_seconds() / grid_seconds)
    return deadline + timedelta(seconds=steps * grid_seconds)


def unpublished(row: dict[str, Any], now: datetime) -> bool:
    """Whether a submission row's verdict is stored but not yet to be shown."""
    published = row.get("published_at")
    if published is None:
        return False
    if published.tzinfo is None:  # SQLite returns naive datetimes, written as UTC
        published = published.replace(tzinfo=now.tzinfo)
    return bool(now < published)


def shown_as(row: dict[str, Any], now: datetime) -> dict[str, Any]:
    """The submission row as a submitter may read it at ``now``: before publication, still running.

    The verdict, the finished time and the state it reached are held back; so is its holdout release,
    which callers leave out when this returns a row with ``held_back`` set. A canceled submission's verdict
    and release, when one was given before the cancel (it read as running then), are never shown.
    """
    if row.get("state") == "canceled":
        return {**row, "verdict": None, "held_back": True}
    if not unpublished(row, now):
        return {**row, "held_back": False}
    return {**row, "state": "running", "finished_at": None, "verdict": None, "error": None,
            "failure_cause": None, "policy_version": None, "champion_id": None, "held_back": True}
