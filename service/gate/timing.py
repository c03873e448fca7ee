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

What remains: the verdict's time still depends on the summary and on queueing, which the sealed rows do
not set (save that the holdout process shares the machine with the folds); and an attempt killed with its
whole worker (no deadline watchdog left) is settled when the next job finds its claim stale, at most once
per submission, after the attempt was already counted. See README.md, "Timing".
"""

from __future__ import annotations

import math
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
