"""The submission documents one API process answered last, by submission id and ETag.

A client polling without ``If-None-Match`` (or whose ETag is old) gets the whole document. Its ETag
is known from one query (``records.submission_versions``); when this process built the document of
that very version a moment ago, the encoded body is answered again instead of reading the folds and the
release and encoding it anew. The key is the ETag, so a changed submission is never answered from
here: its new version has a new ETag. Bounded by ``max_entries``; the oldest entry goes first.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass, field

MAX_ENTRIES = 256  # documents are a few KB to a few hundred KB each


@dataclass
class RecentDocuments:
    """Encoded documents by (submission id, ETag); safe to share between threads."""

    max_entries: int = MAX_ENTRIES
    _entries: OrderedDict[tuple[str, str], str] = field(default_factory=OrderedDict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def get(self, sub_id: str, etag: str) -> str | None:
        """Return the encoded document of this version, if this process built it recently."""
        with self._lock:
            body = self._entries.get((sub_id, etag))
            if body is not None:
                self._entries.move_to_end((sub_id, etag))
            return body

    def put(self, sub_id: str, etag: str, body: str) -> None:
        """Remember the encoded document of one version."""
        with self._lock:
            self._entries[(sub_id, etag)] = body
            self._entries.move_to_end((sub_id, etag))
            while len(self._entries) > self.max_entries:
                self._entries.popitem(last=False)
