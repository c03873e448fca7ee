"""Team queues: names that carry no team, a registry that lists them, and the walk over every work queue.

Real redis-server (the session's), a queue name of each test's own.
"""

from __future__ import annotations

import pytest
from redis import Redis
from rq.utils import current_timestamp

from service.errors import SettingsError
from service.settings import Settings
from service.submission import team_queues


def test_a_team_queue_is_named_by_a_digest_stable_per_team_and_distinct_between_teams(settings: Settings) -> None:
    fleet, rivals = (team_queues.team_queue_name(settings, t) for t in ("fleet", "rivals"))
    assert fleet == team_queues.team_queue_name(settings, "fleet") != rivals
    # No team name in the queue name, hence in no Redis key (rq:queue:<name>, its registries).
    assert "fleet" not in fleet and "rivals" not in rivals
    assert fleet.startswith(f"{settings.queue_name}:t:") and len(fleet) == len(settings.queue_name) + 3 + 16
    assert team_queues.is_team_queue(settings, fleet)
    assert not team_queues.is_team_queue(settings, settings.queue_name)
    assert not team_queues.is_team_queue(settings, settings.check_queue_name)


def test_work_queues_are_the_base_queue_then_every_registered_team_queue(redis: Redis, settings: Settings) -> None:
    assert team_queues.work_queue_names(redis, settings) == [settings.queue_name]
    rivals = team_queues.team_queue(redis, settings, "rivals")
    fleet = team_queues.team_queue(redis, settings, "fleet")
    team_queues.team_queue(redis, settings, "fleet")  # registering twice lists it once
    assert team_queues.work_queue_names(redis, settings) == [settings.queue_name, *sorted([fleet.name, rivals.name])]
    assert [q.name for q in team_queues.work_queues(redis, settings)] == team_queues.work_queue_names(redis, settings)


def test_started_jobs_are_read_over_every_work_queue(redis: Redis, settings: Settings) -> None:
    fleet = team_queues.team_queue(redis, settings, "fleet")
    rivals = team_queues.team_queue(redis, settings, "rivals")
    for queue, job_id in ((fleet, "a-fold-0-0"), (rivals, "b-fold-0-0")):
        # RQ 3 keeps "<job id>:<execution id>" entries scored by their expiry time.
        redis.zadd(queue.started_job_registry.key, {f"{job_id}:exec1": current_timestamp() + 60})
    assert sorted(team_queues.started_job_ids(redis, settings)) == ["a-fold-0-0", "b-fold-0-0"]


def test_the_running_cap_is_read_from_its_environment_variable_and_must_not_be_negative() -> None:
    assert Settings.load(environ={}).team_max_running_jobs == 0  # off unless set
    assert Settings.load(environ={"SEALFOLD_TEAM_MAX_RUNNING": "1"}).team_max_running_jobs == 1
    with pytest.raises(SettingsError, match="team_max_running_jobs must be 0 \\(no limit\\) or positive, got -1"):
        Settings.load({"team_max_running_jobs": -1}, environ={})
