"""Settings shared by the API process, the workers and the command line.

Layered once: defaults, then the environment, then explicit overrides (tests, ``create_app``).
Nothing here opens a connection; callers build engines and Redis clients from these values.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.errors import SettingsError

_ENV_NAMES: dict[str, str] = {
    "data_dir": "SEALFOLD_DATA_DIR",
    "database_url": "DATABASE_URL",
    "redis_url": "REDIS_URL",
    "import_root": "SEALFOLD_IMPORT_ROOT",
    "max_upload_bytes": "SEALFOLD_MAX_UPLOAD_BYTES",
    "db_statement_timeout_seconds": "SEALFOLD_DB_STATEMENT_TIMEOUT",
    "db_lock_timeout_seconds": "SEALFOLD_DB_LOCK_TIMEOUT",
    "queue_name": "SEALFOLD_QUEUE",
    "fold_timeout_seconds": "SEALFOLD_FOLD_TIMEOUT",
    "fold_batch_max_rows": "SEALFOLD_FOLD_BATCH_ROWS",
    "check_timeout_seconds": "SEALFOLD_CHECK_TIMEOUT",
    "memory_limit_mib": "SEALFOLD_MEMORY_LIMIT_MIB",
    "job_nice": "SEALFOLD_JOB_NICE",
    "holdout_pad_seconds": "SEALFOLD_HOLDOUT_PAD",
    "holdout_prompt_seconds": "SEALFOLD_HOLDOUT_PROMPT",
    "team_max_live_submissions": "SEALFOLD_TEAM_MAX_LIVE",
    "team_max_running_jobs": "SEALFOLD_TEAM_MAX_RUNNING",
    "min_rows": "SEALFOLD_MIN_ROWS",
    "log_level": "SEALFOLD_LOG_LEVEL",
    "log_format": "SEALFOLD_LOG_FORMAT",
    "metrics_token": "SEALFOLD_METRICS_TOKEN",
    "min_free_disk_mb": "SEALFOLD_MIN_FREE_DISK_MB",
    "data_source": "SEALFOLD_DATA_SOURCE",
    "api_url": "SEALFOLD_API_URL",
    "worker_secret": "SEALFOLD_WORKER_SECRET",
    "data_cache_max_mb": "SEALFOLD_DATA_CACHE_MAX_MB",
    "key_cache_seconds": "SEALFOLD_KEY_CACHE_SECONDS",
}
DATA_SOURCES = ("shared", "api")


@dataclass(frozen=True)
class Settings:
    """Every tunable of a sealfold deployment, validated on construction."""

    data_dir: Path = Path("var")
    database_url: str = ""  # empty: SQLite file under data_dir
    redis_url: str = "redis://127.0.0.1:6379/0"
    import_root: Path | None = None  # None: importing by path is disabled
    max_upload_bytes: int = 512 * 1024 * 1024
    # PostgreSQL only: a statement, or a wait for a lock, that runs longer fails (0: no limit).
    db_statement_timeout_seconds: float = 5.0
    db_lock_timeout_seconds: float = 2.0
    queue_name: str = "sealfold"
    fold_timeout_seconds: int = 3600
    # A submission on a dataset of at most this many development rows runs its folds one after another in a
    # single job (each fold still under the fold timeout), instead of a job per fold: on small tables a job's
    # bookkeeping costs more than its fit. Larger tables keep a job per fold, spread over the workers (0: a
    # job per fold always). Set it the same on the API and the workers.
    fold_batch_max_rows: int = 5000
    check_timeout_seconds: float = 10.0
    # What a fold or holdout process may add to its address space (RLIMIT_AS) while it runs a job, in MiB
    # (0: no limit); beyond it the job fails with "memory limit N MiB exceeded" and is not retried.
    memory_limit_mib: int = 4096
    # How much the processes that fit (a worker's fold process, the holdout's horse) lower their CPU priority
    # (nice, 0-19), so the API and the checkers on the same host answer at once while folds run.
    job_nice: int = 10
    # The holdout step's deadline is 4 x the pipeline's prediction time on as many development rows, plus
    # this, rounded up to a multiple of it; its verdict is shown no earlier (service.gate.timing). 0 turns
    # the deadline off: the step's duration can then be read from the times a submitter sees.
    holdout_pad_seconds: float = 1.0
    # Seconds added to the holdout step's prompt time (twice its development-row prediction time, plus this):
    # a verdict given by then is shown then; one that came later because of the sealed step is shown as
    # without it and counted as one more holdout query (service.gate.timing). 0: every verdict that read the
    # holdout waits for the deadline.
    holdout_prompt_seconds: float = 0.075
    # Submissions one team may have queued or running at once (0: no limit); beyond it a POST answers 429,
    # so one team's burst cannot fill the queue ahead of every other team.
    team_max_live_submissions: int = 100
    # Jobs of one team that may run at once over every worker (0: no limit). Workers already take the teams'
    # queues in turn; this cap also keeps workers free for other teams while one team's long jobs run, at the
    # price of idle workers when only that team has work.
    team_max_running_jobs: int = 0
    min_rows: int = 50
    log_level: str = "INFO"
    log_format: str = "json"  # "text" for reading in a terminal
    # When set, GET /metrics needs "Authorization: Bearer <metrics_token>" (operators only).
    metrics_token: str = ""
    # /readyz fails when the data dir's file system has less free space than this.
    min_free_disk_mb: int = 512
    # Where a worker finds dataset files: "shared" (data_dir is the deployment's shared volume) or "api"
    # (data_dir is this worker's own cache, filled from the API at api_url, authenticated by worker_secret).
    data_source: str = "shared"
    api_url: str = ""
    # Held by the API and every worker: the internal data endpoint answers only "Bearer <worker_secret>",
    # and is off (404) when the API has none.
    worker_secret: str = ""
    # With data_source "api": the most the worker's cache of development files may hold, in MiB (0: no cap).
    # Datasets used longest ago are removed first, never one used within the longest job timeout
    # (worker.process.cache_prune).
    data_cache_max_mb: int = 10240
    # How long an API process trusts a key it verified before it reads the key's record again (0: every
    # request reads it). A key revoked elsewhere stops working in every API process within this bound.
    key_cache_seconds: float = 2.0
    extra: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.max_upload_bytes < 1024:
            raise SettingsError(f"max_upload_bytes must be at least 1024, got {self.max_upload_bytes}")
        for name in ("db_statement_timeout_seconds", "db_lock_timeout_seconds"):
            if getattr(self, name) < 0:
                raise SettingsError(f"{name} must be 0 (no limit) or positive, got {getattr(self, name)}")
        if self.fold_timeout_seconds < 1:
            raise SettingsError(f"fold_timeout_seconds must be positive, got {self.fold_timeout_seconds}")
        if self.fold_batch_max_rows < 0:
            raise SettingsError(f"fold_batch_max_rows must be 0 (a job per fold) or positive, got "
                                f"{self.fold_batch_max_rows}")
        if self.log_format not in ("json", "text"):
            raise SettingsError(f"log_format must be json or text, got {self.log_format!r}")
        if self.min_free_disk_mb < 0:
            raise SettingsError(f"min_free_disk_mb must be 0 or positive, got {self.min_free_disk_mb}")
        if self.memory_limit_mib < 0:
            raise SettingsError(f"memory_limit_mib must be 0 (no limit) or positive, got {self.memory_limit_mib}")
        if self.team_max_live_submissions < 0:
            raise SettingsError("team_max_live_submissions must be 0 (no limit) or positive, got "
                                f"{self.team_max_live_submissions}")
        if self.team_max_running_jobs < 0:
            raise SettingsError("team_max_running_jobs must be 0 (no limit) or positive, got "
                                f"{self.team_max_running_jobs}")
        if self.holdout_pad_seconds < 0:
            raise SettingsError(f"holdout_pad_seconds must be 0 (no deadline) or positive, got "
                                f"{self.holdout_pad_seconds}")
        if self.holdout_prompt_seconds < 0:
            raise SettingsError(f"holdout_prompt_seconds must be 0 (no prompt time) or positive, got "
                                f"{self.holdout_prompt_seconds}")
        if not 0 <= self.job_nice <= 19:
            raise SettingsError(f"job_nice must be between 0 and 19, got {self.job_nice}")
        if self.data_source not in DATA_SOURCES:
            raise SettingsError(f"data_source must be one of {', '.join(DATA_SOURCES)}, got {self.data_source!r}")
        if self.data_source == "api":
            missing = [n for n in ("api_url", "worker_secret", "database_url") if not getattr(self, n)]
            if missing:
                raise SettingsError(f"data_source 'api' needs {', '.join(missing)} (SEALFOLD_API_URL, "
                                    "SEALFOLD_WORKER_SECRET, DATABASE_URL: the data dir is then a local cache, "
                                    "so the records database cannot live in it)")
        if self.data_cache_max_mb < 0:
            raise SettingsError(f"data_cache_max_mb must be 0 (no cap) or positive, got {self.data_cache_max_mb}")
        if not 0 <= self.key_cache_seconds <= 60:
            raise SettingsError(f"key_cache_seconds must be between 0 and 60, got {self.key_cache_seconds}")
        if self.min_rows < 10:
            raise SettingsError(f"min_rows must be at least 10, got {self.min_rows}")

    @property
    def effective_database_url(self) -> str:
        """The records DB URL: ``database_url`` or a SQLite file under the data dir."""
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'records.sqlite3').resolve()}"

    def job_timeout_seconds(self, kind: str) -> int:
        """How long a job of ``kind`` (``service.ops.job_tallies.KINDS``' values) may run before it is killed.

        Read by the API when it enqueues and by the worker when it runs a job: a worker applies its own
        settings, so one ``SEALFOLD_FOLD_TIMEOUT`` on every host is the fold timeout everywhere.
        """
        if kind == "fold":
            return self.fold_timeout_seconds
        if kind == "holdout":  # a refit on all development rows, then scoring the sealed rows
            return self.fold_timeout_seconds * 2
        if kind == "check":
            return max(30, int(self.check_timeout_seconds) * 3)
        return 600  # summary and verdict: bookkeeping, never a fit

    @property
    def longest_job_timeout_seconds(self) -> int:
        """The longest any job may run: what a job that opened a dataset's files may still be reading them."""
        return max(self.job_timeout_seconds(kind) for kind in ("fold", "holdout", "check", "other"))

    @property
    def check_queue_name(self) -> str:
        """Queue for quick configuration checks, served before fold work."""
        return f"{self.queue_name}-check"

    @classmethod
    def load(
        cls, overrides: Mapping[str, Any] | None = None, environ: Mapping[str, str] | None = None
    ) -> Settings:
        """Build settings from defaults, then ``environ`` (default: os.environ), then ``overrides``."""
        env = os.environ if environ is None else environ
        values: dict[str, Any] = {}
        fields = {f.name: f for f in dataclasses.fields(cls)}
        for name, env_name in _ENV_NAMES.items():
            raw = env.get(env_name)
            if raw is not None and raw != "":
                values[name] = _coerce(name, raw, fields[name].type)
        for name, value in (overrides or {}).items():
            if name not in fields:
                raise SettingsError(f"unknown setting {name!r}; known: {', '.join(sorted(fields))}")
            values[name] = _coerce(name, value, fields[name].type) if isinstance(value, str) else value
        if "data_dir" in values:
            values["data_dir"] = Path(values["data_dir"])
        if values.get("import_root") is not None:
            values["import_root"] = Path(values["import_root"])
        return cls(**values)


def _coerce(name: str, raw: str, annotation: Any) -> Any:
    kind = str(annotation)
    try:
        if kind == "int":
            return int(raw)
        if kind == "float":
            return float(raw)
    except ValueError as exc:
        raise SettingsError(f"{name} must be a number, got {raw!r}") from exc
    if "Path" in kind:
        return Path(raw)
    return raw
