"""Submission intake at the core: dataset lookup, replay by Idempotency-Key, the probability check, cancel.

A SQLite records DB on tmp_path, the session's real redis-server with a queue of each test's own (so
what intake enqueues, and what cancel cancels, is read back through RQ), and the worker's
configuration check answered in-process.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import pytest
from redis import Redis
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer
from sklearn.svm import SVC
from sqlalchemy import Engine, func, select

from service.errors import ConfigRejected, Conflict, FieldProblem, Forbidden, InputError, NotFound
from service.gate.policy import default_policy
from service.records import policies, submissions
from service.records.keys import KeyInfo, create_key
from service.records.tables import audit_events
from service.records.tables import submissions as submissions_table
from service.settings import Settings
from service.submission import dispatch, intake, team_queues
from service.submission.config import DatasetRef, ModelSpec, SubmissionRequest, ValidationSpec
from service.vault.fingerprint import fingerprint_frame
from service.vocabulary import LIVE_STATES
from tests.support.frames import breast_cancer_frame, diabetes_frame
from tests.support.records import add_dataset_row
from worker.jobs import check
from worker.jobs.runtime import WorkerContext


@pytest.fixture
def keys(records: Engine) -> dict[str, KeyInfo]:
    """Keys of two teams: the fleet's owner, a second submitter and a steward; a rival submitter."""
    made = {"owner": ("fleet", "submitter"), "colleague": ("fleet", "submitter"), "steward": ("fleet", "steward"),
            "rival": ("rivals", "submitter")}
    return {who: create_key(records, team, role, who)[0] for who, (team, role) in made.items()}


@pytest.fixture
def dataset(records: Engine, keys: dict[str, KeyInfo]) -> dict[str, Any]:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn) as the fleet's dataset: regression, 5 folds."""
    return add_dataset_row(records, diabetes_frame(), "target", "regression", folds=5,
                           created_by=keys["steward"].id)


@pytest.fixture
def asked(monkeypatch: pytest.MonkeyPatch) -> list[dict[str, Any]]:
    """Answer the worker's configuration check with "ok" and keep the documents it was sent."""
    documents: list[dict[str, Any]] = []

    def check_ok(redis: Any, settings: Any, config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
        documents.append(config_doc)
        return {"ok": True, "has_proba": False, "linear": True}

    monkeypatch.setattr(dispatch, "check_config_remote", check_ok)
    return documents


def ridge(dataset: dict[str, Any], alpha: float = 1.0, **options: Any) -> SubmissionRequest:
    return SubmissionRequest(dataset=DatasetRef(dataset["id"]), model=ModelSpec("Ridge", {"alpha": alpha}),
                             **options)


def queued_ids(redis: Redis, settings: Settings) -> list[str]:
    """Every queued job id, over every work queue (each team's, and the base queue)."""
    return [i for queue in team_queues.work_queues(redis, settings) for i in queue.get_job_ids()]


def count_submissions(engine: Engine) -> int:
    with engine.connect() as conn:
        return int(conn.execute(select(func.count()).select_from(submissions_table)).scalar_one())


# -- find_dataset ---------------------------------------------------------------------------------


def test_find_dataset_answers_the_callers_team_only(
    records: Engine, keys: dict[str, KeyInfo], dataset: dict[str, Any]
) -> None:
    assert intake.find_dataset(records, keys["owner"], DatasetRef(dataset["id"]))["id"] == dataset["id"]
    for who, ref in (("rival", dataset["id"]), ("owner", "ds_missing")):
        with pytest.raises(NotFound) as caught:
            intake.find_dataset(records, keys[who], DatasetRef(ref))
        assert [p.pointer for p in caught.value.problems] == ["/dataset"]
        assert f"in team {keys[who].team!r}" in caught.value.detail


def test_find_dataset_checks_a_pinned_fingerprint(
    records: Engine, keys: dict[str, KeyInfo], dataset: dict[str, Any]
) -> None:
    # The pin is the published fingerprint; the unsalted hash of all 442 diabetes rows is not it.
    pinned = dataset["fingerprint"]
    assert intake.find_dataset(records, keys["owner"], DatasetRef(dataset["id"], pinned))["id"] == dataset["id"]
    for other in (fingerprint_frame(diabetes_frame()), fingerprint_frame(diabetes_frame().iloc[:441])):
        with pytest.raises(Conflict) as caught:
            intake.find_dataset(records, keys["owner"], DatasetRef(dataset["id"], other))
        assert caught.value.problems == [FieldProblem("/dataset/fingerprint",
                                                      "the pinned fingerprint does not match the dataset")]


# -- submit ---------------------------------------------------------------------------------------


def test_submit_stores_the_row_then_enqueues_its_chain(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    row, created = intake.submit(records, redis, settings, keys["owner"],
                                 ridge(dataset, metrics=("mae",), validation=ValidationSpec(repeats=2), label="r1"))
    assert created is True
    assert (row["state"], row["team"], row["owner_key_id"], row["label"]) == ("queued", "fleet", keys["owner"].id, "r1")
    assert row["folds_total"] == 5 * 2
    document = row["config"]
    # The default regression policy judges on rmse, so it is computed beside the asked-for mae.
    assert document["metrics"] == ["mae", "rmse"]
    assert document["linear"] is True  # from the worker's answer
    assert [d["model"] for d in asked] == [{"estimator": "Ridge", "params": {"alpha": 1.0},
                                           "features": [c for c in diabetes_frame().columns if c != "target"],
                                           "preprocess": []}]
    sub = row["id"]
    # Diabetes' development rows are under fold_batch_max_rows: its ten folds run in one job, in plan order.
    assert settings.fold_batch_max_rows >= dataset["rows_development"]
    assert queued_ids(redis, settings) == [f"{sub}-holdout", f"{sub}-folds"]
    folds = Job.fetch(f"{sub}-folds", connection=redis, serializer=JSONSerializer)
    assert folds.func_name == "worker.jobs.run_folds"
    assert folds.args == [sub, [[r, f] for r in range(2) for f in range(5)]]
    # It summarises the folds itself: no summary job; the verdict waits for it and the holdout.
    assert Job.exists(f"{sub}-summary", connection=redis) is False
    verdict = Job.fetch(f"{sub}-verdict", connection=redis, serializer=JSONSerializer)
    assert set(verdict.dependency_ids) == {f"{sub}-folds", f"{sub}-holdout"}
    with records.connect() as conn:
        actions = conn.execute(select(audit_events.c.action).where(audit_events.c.subject == sub)).scalars().all()
    assert actions == ["submission.created"]


def test_a_table_over_the_batch_size_gets_a_job_per_fold(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    per_fold = dataclasses.replace(settings, fold_batch_max_rows=int(dataset["rows_development"]) - 1)
    row, _ = intake.submit(records, redis, per_fold, keys["owner"], ridge(dataset))
    sub = row["id"]
    assert queued_ids(redis, settings) == [f"{sub}-holdout", *(f"{sub}-fold-0-{f}" for f in range(5))]
    summary = Job.fetch(f"{sub}-summary", connection=redis, serializer=JSONSerializer)
    assert set(summary.dependency_ids) == {f"{sub}-fold-0-{f}" for f in range(5)}


@pytest.mark.parametrize(("asked_for", "expected"), [(("mae",), ["mae", "r2"]), (("r2", "mae"), ["r2", "mae"])])
def test_the_policys_primary_metric_is_always_computed(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]], asked_for: tuple[str, ...], expected: list[str],
) -> None:
    assert policies.put(records, dataset["id"], {"primary_metric": "r2"}, keys["steward"].id) == 1
    row, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset, metrics=asked_for))
    assert row["config"]["metrics"] == expected


def test_a_replay_under_the_same_idempotency_key_returns_the_first_submission(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    first, created = intake.submit(records, redis, settings, keys["owner"], ridge(dataset), idempotency_key="k-1")
    jobs = queued_ids(redis, settings)
    again, created_again = intake.submit(records, redis, settings, keys["owner"], ridge(dataset),
                                         idempotency_key="k-1")
    assert (created, created_again) == (True, False) and again["id"] == first["id"]
    assert len(asked) == 1 and queued_ids(redis, settings) == jobs  # nothing checked or enqueued again
    with pytest.raises(InputError) as caught:
        intake.submit(records, redis, settings, keys["owner"], ridge(dataset, alpha=2.0), idempotency_key="k-1")
    assert [p.pointer for p in caught.value.problems] == [""] and "Idempotency-Key" in caught.value.detail
    # The key is the caller's own: a colleague may use the same one for a submission of theirs.
    theirs, created_theirs = intake.submit(records, redis, settings, keys["colleague"], ridge(dataset, alpha=3.0),
                                           idempotency_key="k-1")
    assert created_theirs is True and theirs["id"] != first["id"]
    assert count_submissions(records) == 2


def test_a_replay_that_raced_the_first_request_to_the_insert_returns_the_first(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]], monkeypatch: pytest.MonkeyPatch,
) -> None:
    first, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset), idempotency_key="k-race")
    jobs = queued_ids(redis, settings)
    # The second request looked before the first one's row was committed, and found nothing.
    for lookup in ("find_by_idempotency_key", "find_by_config"):
        real = getattr(submissions, lookup)
        calls: list[int] = []

        def not_yet(*args: Any, _real: Any = real, _calls: list[int] = calls) -> Any:
            _calls.append(1)
            return None if len(_calls) == 1 else _real(*args)

        monkeypatch.setattr(submissions, lookup, not_yet)
    second, created = intake.submit(records, redis, settings, keys["owner"], ridge(dataset), idempotency_key="k-race")
    assert created is False and second["id"] == first["id"]
    assert count_submissions(records) == 1 and queued_ids(redis, settings) == jobs


def test_the_same_configuration_again_returns_the_earlier_submission_unless_it_was_canceled(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    first, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    jobs = queued_ids(redis, settings)
    # A colleague in the same team sends the same model on the same data: nothing is recomputed.
    same, created = intake.submit(records, redis, settings, keys["colleague"], ridge(dataset))
    assert created is False and same["id"] == first["id"]
    assert len(asked) == 1 and queued_ids(redis, settings) == jobs
    intake.cancel(records, redis, settings, keys["owner"], first["id"])
    fresh, created = intake.submit(records, redis, settings, keys["colleague"], ridge(dataset))
    assert created is True and fresh["id"] != first["id"] and len(asked) == 2


def test_a_configuration_the_infrastructure_failed_runs_again_and_one_that_failed_itself_does_not(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    first, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    # Its own fault (e.g. every fold raised): the same configuration answers with that failure.
    submissions.transition(records, first["id"], "failed", LIVE_STATES, error="ValueError: the fit diverged")
    same, created = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    assert created is False and same["id"] == first["id"] and same["state"] == "failed"
    # Lost to the infrastructure (a broken seal, a damaged loss file, every fold lost): it runs again.
    second, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset, alpha=2.0))
    submissions.transition(records, second["id"], "failed", LIVE_STATES, error="the seal is broken", reopen=True)
    again, created = intake.submit(records, redis, settings, keys["owner"], ridge(dataset, alpha=2.0))
    assert created is True and again["id"] != second["id"] and again["state"] == "queued"
    # ... once: the new run holds the configuration now.
    third, created = intake.submit(records, redis, settings, keys["colleague"], ridge(dataset, alpha=2.0))
    assert created is False and third["id"] == again["id"]


def test_a_new_policy_version_lets_the_same_configuration_be_judged_under_it(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    first, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    document = {**default_policy("regression").to_document(0), "champion_margin": 1.0}
    policies.put(records, dataset["id"], {k: v for k, v in document.items() if k != "version"}, keys["steward"].id)
    second, created = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    assert created is True and second["id"] != first["id"]
    assert intake.submit(records, redis, settings, keys["owner"], ridge(dataset))[0]["id"] == second["id"]


def test_a_configuration_the_checks_refuse_writes_and_enqueues_nothing(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    refused = ConfigRejected("alpha must be >= 0", [FieldProblem("/model/params/alpha", "alpha must be >= 0")])

    def worker_refuses(*_args: Any) -> dict[str, Any]:
        raise refused

    monkeypatch.setattr(dispatch, "check_config_remote", worker_refuses)
    with pytest.raises(ConfigRejected) as caught:
        intake.submit(records, redis, settings, keys["owner"], ridge(dataset, alpha=-1.0), idempotency_key="k-2")
    assert caught.value is refused
    with pytest.raises(ConfigRejected) as caught:  # refused before the worker is asked
        intake.submit(records, redis, settings, keys["owner"], SubmissionRequest(
            dataset=DatasetRef(dataset["id"]), model=ModelSpec("LogisticRegression")))
    assert [p.pointer for p in caught.value.problems] == ["/model/estimator"]
    assert count_submissions(records) == 0 and queued_ids(redis, settings) == []


# -- probability metrics --------------------------------------------------------------------------


@pytest.fixture
def cancer(records: Engine, keys: dict[str, KeyInfo]) -> dict[str, Any]:
    """Breast cancer Wisconsin (bundled with scikit-learn) as the fleet's binary classification dataset."""
    return add_dataset_row(records, breast_cancer_frame(), "target", "classification", folds=5,
                           created_by=keys["steward"].id)


@pytest.fixture
def worker_checks(monkeypatch: pytest.MonkeyPatch, records: Engine, settings: Settings) -> None:
    """Answer the configuration check with the worker's own check, run in this process."""
    ctx = WorkerContext(settings=settings, engine=records)
    monkeypatch.setattr(dispatch, "check_config_remote",
                        lambda _redis, _settings, doc, ds_id: check.check_config(ctx, doc, ds_id))


def test_probability_metrics_are_refused_for_a_model_without_probabilities(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], cancer: dict[str, Any],
    worker_checks: None,
) -> None:
    # Reference: scikit-learn's SVC has predict_proba only with probability=True (its default is False).
    assert not hasattr(SVC(), "predict_proba") and hasattr(SVC(probability=True), "predict_proba")
    metrics = ("accuracy", "roc_auc", "f1", "log_loss")
    request = SubmissionRequest(dataset=DatasetRef(cancer["id"]), model=ModelSpec("SVC"), metrics=metrics)
    with pytest.raises(ConfigRejected) as caught:
        intake.submit(records, redis, settings, keys["owner"], request)
    assert [p.pointer for p in caught.value.problems] == ["/metrics/1", "/metrics/3"]
    assert "'roc_auc' needs predicted probabilities" in caught.value.detail and "SVC" in caught.value.detail
    # The parameter that turns them on is named, found from scikit-learn's own constraints.
    assert "set probability=true in model.params" in caught.value.detail
    assert count_submissions(records) == 0 and queued_ids(redis, settings) == []

    labels_only = SubmissionRequest(dataset=DatasetRef(cancer["id"]), model=ModelSpec("SVC"), metrics=("f1",))
    row, created = intake.submit(records, redis, settings, keys["owner"], labels_only)
    # The stored key spells out the choice: breast cancer's classes are 0 and 1, the positive one is 1.
    assert created is True and row["config"]["metrics"] == ["f1(average=binary;pos_label=1)", "accuracy"]
    with_proba = SubmissionRequest(dataset=DatasetRef(cancer["id"]), model=ModelSpec("SVC", {"probability": True}),
                                   metrics=metrics)
    row, created = intake.submit(records, redis, settings, keys["owner"], with_proba)
    assert created is True and row["config"]["metrics"] == ["accuracy", "roc_auc", "f1(average=binary;pos_label=1)",
                                                        "log_loss"]
    assert row["config"]["linear"] is False


# -- cancel ---------------------------------------------------------------------------------------


def test_the_owner_cancels_and_the_queued_jobs_are_canceled(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    row, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    sub = row["id"]
    canceled = intake.cancel(records, redis, settings, keys["owner"], sub)
    assert canceled["state"] == "canceled" and canceled["finished_at"] is not None
    ids = [f"{sub}-holdout", f"{sub}-folds", f"{sub}-verdict"]
    statuses = {i: Job.fetch(i, connection=redis, serializer=JSONSerializer).get_status() for i in ids}
    assert set(statuses.values()) == {JobStatus.CANCELED}
    assert queued_ids(redis, settings) == []
    with records.connect() as conn:
        events = conn.execute(select(audit_events.c.action, audit_events.c.actor)
                              .where(audit_events.c.subject == sub).order_by(audit_events.c.id)).all()
    assert [tuple(e) for e in events] == [("submission.created", keys["owner"].id),
                                          ("submission.canceled", keys["owner"].id)]
    with pytest.raises(Conflict, match="already canceled"):
        intake.cancel(records, redis, settings, keys["owner"], sub)


def test_who_may_cancel(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    row, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset))
    with pytest.raises(NotFound):
        intake.cancel(records, redis, settings, keys["rival"], row["id"])
    with pytest.raises(NotFound):
        intake.cancel(records, redis, settings, keys["owner"], "sub_missing")
    with pytest.raises(Forbidden):
        intake.cancel(records, redis, settings, keys["colleague"], row["id"])
    assert submissions.get(records, row["id"])["state"] == "queued"  # type: ignore[index]
    assert intake.cancel(records, redis, settings, keys["steward"], row["id"])["state"] == "canceled"
    done, _ = intake.submit(records, redis, settings, keys["owner"], ridge(dataset, alpha=5.0))
    assert submissions.transition(records, done["id"], "succeeded", LIVE_STATES)
    with pytest.raises(Conflict, match="already succeeded"):
        intake.cancel(records, redis, settings, keys["owner"], done["id"])


# -- per-team limit ---------------------------------------------------------------------------------


def test_a_team_at_its_live_limit_gets_429_and_other_teams_do_not(
    records: Engine, redis: Redis, settings: Settings, keys: dict[str, KeyInfo], dataset: dict[str, Any],
    asked: list[dict[str, Any]],
) -> None:
    from dataclasses import replace

    from service.errors import TeamLimitReached

    limited = replace(settings, team_max_live_submissions=2)
    for alpha in (1.0, 2.0):
        assert intake.submit(records, redis, limited, keys["owner"], ridge(dataset, alpha))[1] is True
    with pytest.raises(TeamLimitReached) as caught:
        intake.submit(records, redis, limited, keys["colleague"], ridge(dataset, 3.0))
    assert caught.value.status == 429 and "team fleet has 2 submissions queued or running" in caught.value.detail
    assert count_submissions(records) == 2 and len(asked) == 2  # refused before the check, nothing written
    # Another team is not held up by this one's; a replay is still answered; a finished one frees a place.
    rival_data = add_dataset_row(records, diabetes_frame(), "target", "regression", folds=5,
                                 created_by=create_key(records, "rivals", "steward", "rs")[0].id, team="rivals")
    assert intake.submit(records, redis, limited, keys["rival"], ridge(rival_data, 3.0))[1] is True
    assert intake.submit(records, redis, limited, keys["owner"], ridge(dataset, 1.0))[1] is False
    oldest = submissions.list_for_team(records, "fleet")[-1]
    assert submissions.transition(records, oldest["id"], "canceled", LIVE_STATES)
    assert intake.submit(records, redis, limited, keys["colleague"], ridge(dataset, 3.0))[1] is True
