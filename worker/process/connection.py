"""The worker's Redis client: one whose new connections skip re-reading redis-py's installed version.

redis-py 7 and later build the name and version they announce to the server (``CLIENT SETINFO``) for
every new connection, reading the package's metadata from disk each time (some 0.5 ms warm, more in a
fresh fork). A worker's pooled connections pay that once, but every holdout horse opens its own two,
after the fork: the version is resolved here once, before any fork, and handed to every connection.
"""

from __future__ import annotations

from typing import Any

from redis import Redis


def worker_redis(url: str) -> Redis:
    """Return a client for ``url`` whose connections announce the library's name and version, resolved now."""
    return Redis.from_url(url, **_resolved_driver_info())


def _resolved_driver_info() -> dict[str, Any]:
    try:
        from redis.driver_info import DriverInfo
    except ImportError:  # redis-py before 7 reads its version once, at import
        return {}
    return {"driver_info": DriverInfo()}  # resolves the version now, once
