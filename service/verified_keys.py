"""A short-lived memory of the API keys one API process has verified, so a polling client costs no key lookup.

Every request used to read the key's record. A client polling a submission sends the same key many
times a second, so each process remembers, for ``ttl`` seconds, what the records said about a token
(by its hash, never the token) when it named a live key. A token that names none is looked up every
time, as before, so guessing costs what it did. A key revoked through this
process is forgotten at once; one revoked elsewhere (another API process, the command line, the desk
on another host) stops working here at most ``ttl`` seconds after its revocation was committed.
``ttl`` 0 reads the record on every request, as before.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from sqlalchemy import Engine

from service.ids import token_hash
from service.records import keys
from service.records.keys import KeyInfo

MAX_ENTRIES = 4096  # keys remembered at once; beyond it the memory starts afresh


@dataclass
class VerifiedKeys:
    """Keys verified in the last ``ttl`` seconds, by token hash; safe to share between threads."""

    ttl: float
    clock: Callable[[], float] = time.monotonic
    _entries: dict[str, tuple[float, KeyInfo]] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def authenticate(self, engine: Engine, token: str) -> KeyInfo | None:
        """Return the live key for ``token``, or None, reading the records at most once per ``ttl``."""
        if self.ttl <= 0:
            return keys.authenticate(engine, token)
        digest, now = token_hash(token), self.clock()
        entry = self._entries.get(digest)
        if entry is not None and entry[0] > now:
            return entry[1]
        info = keys.authenticate(engine, token)
        if info is None:
            return None
        with self._lock:
            if len(self._entries) >= MAX_ENTRIES:
                self._entries.clear()
            self._entries[digest] = (now + self.ttl, info)
        return info

    def forget(self, key_id: str) -> None:
        """Drop a key at once (it was just revoked through this process)."""
        with self._lock:
            for digest in [d for d, (_, info) in self._entries.items() if info.id == key_id]:
                del self._entries[digest]
