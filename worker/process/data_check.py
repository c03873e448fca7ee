"""Whether a worker sees the deployment's data: the check it makes at start-up and before each job."""

from __future__ import annotations

from collections.abc import Callable

from service.ops import data_identity
from service.settings import Settings
from worker.process.fetched_data import DataFetcher, FetchFailed


def data_checker(
    settings: Settings, recorded: str | None, fetcher: DataFetcher | None
) -> Callable[[bool], str | None]:
    """Why this worker cannot use the deployment's data now, or None (the argument: at start-up).

    On a shared disk, the data dir's marker must match the records DB. A fetching worker compares the
    records DB's identity with the one its API reports instead (its data dir is only a cache); an API it
    cannot reach refuses the start, while before a job it is left to the job's fetch (retried elsewhere).
    A fetching worker whose data dir carries a marker is pointed at a deployment's data volume, which it
    would treat as its cache and prune (``worker.process.cache_prune``): that refuses the start and every job.
    """
    def check(starting: bool) -> str | None:
        on_disk = data_identity.read_marker(settings.data_dir)
        if fetcher is None:
            return data_identity.mismatch(recorded, on_disk, settings.data_dir)
        if on_disk is not None:
            return (f"{settings.data_dir} is a deployment's data directory (it has a {data_identity.MARKER_NAME} "
                    "marker), but SEALFOLD_DATA_SOURCE=api makes the data dir this worker's own cache, which it "
                    "prunes: give the worker a directory of its own, or use SEALFOLD_DATA_SOURCE=shared")
        try:
            reported = fetcher.identity()
        except FetchFailed as exc:
            return f"cannot ask the API for its data identity: {exc}" if starting else None
        if recorded is None or reported != recorded:
            return (f"the API at {settings.api_url} serves another deployment's data (its data identity does "
                    f"not match the records database's): point SEALFOLD_API_URL at this deployment's API")
        return None

    return check
