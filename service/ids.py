"""Identifiers and secrets: prefixed random ids, bearer tokens and their hashes."""

from __future__ import annotations

import hashlib
import hmac
import secrets


def new_id(prefix: str) -> str:
    """Return a fresh id such as ``sub_3f9c0a...``; 80 random bits make collisions negligible."""
    return f"{prefix}_{secrets.token_hex(10)}"


def new_token() -> str:
    """Return a bearer token: 256 random bits, URL-safe, shown to its owner exactly once."""
    return "sf_" + secrets.token_urlsafe(32)


def token_hash(token: str) -> str:
    """Hash a token for storage; tokens are high-entropy, so a plain SHA-256 suffices."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def same_secret(left: str, right: str) -> bool:
    """Compare two secrets in constant time."""
    return hmac.compare_digest(left.encode("utf-8"), right.encode("utf-8"))
