"""Log lines of every sealfold process: one JSON object per line, or plain text for development.

``configure_logging`` installs one handler on the root logger (RQ then adds none of its own, so worker
lines carry the same full timestamp as the API's). Each line has the time in UTC to the millisecond, the
level, the logger, the message, and, when known, the request it serves: ``request_id`` is set by the API for
each request (``X-Request-ID``, taken from the client or made) and by a worker for each job from the id the
API stored in the job's meta, so one id follows a submission from its POST to its last job.

Nothing here names a team, a key or a holdout figure; callers log ids and counts, never sealed data.
"""

from __future__ import annotations

import contextvars
import json
import logging
import re
import sys
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from typing import Any

FORMATS = ("json", "text")
request_id_var: contextvars.ContextVar[str | None] = contextvars.ContextVar("sealfold_request_id", default=None)
# What a client may send as X-Request-ID; anything else is replaced by a fresh id.
_REQUEST_ID = re.compile(r"[A-Za-z0-9._:-]{1,128}")
# LogRecord attributes that are not extras a caller passed.
_STANDARD = frozenset(vars(logging.LogRecord("", 0, "", 0, "", None, None))) | {"message", "asctime"}


def accepted_request_id(sent: str | None) -> str:
    """Return the client's request id when it is a short token, else a fresh one."""
    if sent and _REQUEST_ID.fullmatch(sent):
        return sent
    return uuid.uuid4().hex


@contextmanager
def request_scope(request_id: str | None) -> Iterator[None]:
    """Tag every line logged inside the block with ``request_id``."""
    token = request_id_var.set(request_id)
    try:
        yield
    finally:
        request_id_var.reset(token)


def _timestamp(created: float) -> str:
    return datetime.fromtimestamp(created, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class JsonFormatter(logging.Formatter):
    """One JSON object per record: ts, level, logger, message, request_id, extras, exception."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "ts": _timestamp(record.created),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None) or request_id_var.get()
        if request_id:
            line["request_id"] = request_id
        for key, value in vars(record).items():
            if key not in _STANDARD and key != "request_id" and not key.startswith("_"):
                line[key] = value
        if record.exc_info:
            line["exception"] = self.formatException(record.exc_info)
        return json.dumps(line, default=str, ensure_ascii=False)


class TextFormatter(logging.Formatter):
    """``2026-12-03T08:00:00.123Z INFO logger [request id] message``, for reading in a terminal."""

    def format(self, record: logging.LogRecord) -> str:
        request_id = getattr(record, "request_id", None) or request_id_var.get()
        tag = f" [{request_id}]" if request_id else ""
        text = f"{_timestamp(record.created)} {record.levelname} {record.name}{tag} {record.getMessage()}"
        if record.exc_info:
            text += "\n" + self.formatException(record.exc_info)
        return text


class _SealfoldHandler(logging.StreamHandler):  # type: ignore[type-arg,unused-ignore]
    """The handler ``configure_logging`` installs (a class of its own, so it can be found and replaced)."""


def configure_logging(level: str = "INFO", fmt: str = "json") -> None:
    """Send every logger's records to stderr in ``fmt``.

    Replaces a handler installed by an earlier call or by ``logging.basicConfig`` (a plain stream handler on
    stdout or stderr, as a server's runner may add); leaves other handlers (a test runner's) alone.
    """
    if fmt not in FORMATS:
        raise ValueError(f"log format must be one of {', '.join(FORMATS)}, got {fmt!r}")
    handler = _SealfoldHandler(sys.stderr)
    handler.setFormatter(JsonFormatter() if fmt == "json" else TextFormatter())
    root = logging.getLogger()
    for old in list(root.handlers):
        plain = type(old) is logging.StreamHandler and old.stream in (sys.stderr, sys.stdout)
        if plain or isinstance(old, _SealfoldHandler):
            root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level.upper())
