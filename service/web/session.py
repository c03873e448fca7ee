"""Browser sessions of the desk: a signed, expiring cookie naming a key, re-checked on every page.

The cookie carries the key's id and a random nonce, signed (itsdangerous, with a key derived from
the server's secret in the data dir, so every API process accepts it) and dated: it expires after
``SESSION_SECONDS``. Every page request looks the key up again, so revoking the key ends all of its
sessions at once. The cookie is HttpOnly, SameSite=Lax, Secure when the request came over HTTPS,
and its path is ``/desk``: it is never even sent to the JSON API, which reads bearer keys only.

Each state-changing form carries a CSRF token: an HMAC of the session's nonce (or, on the sign-in
form, of a short-lived pre-session cookie's nonce), compared in constant time.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass
from urllib.parse import urlsplit

from flask import request
from itsdangerous import BadSignature, URLSafeTimedSerializer
from werkzeug.wrappers import Response

from service.api import service_context
from service.records import keys
from service.records.keys import KeyInfo
from service.vault.store import fingerprint_key

PREFIX = "/desk"
SESSION_COOKIE = "sealfold_desk"
SIGN_IN_COOKIE = "sealfold_desk_signin"
SESSION_SECONDS = 8 * 3600
SIGN_IN_SECONDS = 15 * 60
CSRF_FIELD = "csrf"


@dataclass(frozen=True)
class DeskSession:
    """A signed-in browser: the live key and the nonce its CSRF tokens derive from."""

    key: KeyInfo
    nonce: str

    @property
    def csrf(self) -> str:
        return csrf_token(self.nonce)


def _secret() -> bytes:
    return hmac.new(fingerprint_key(service_context().settings), b"sealfold desk session", hashlib.sha256).digest()


def _serializer(salt: str) -> URLSafeTimedSerializer:
    return URLSafeTimedSerializer(_secret(), salt=salt)


def csrf_token(nonce: str) -> str:
    """Return the CSRF token of a session (or sign-in) nonce."""
    return hmac.new(_secret(), f"csrf:{nonce}".encode(), hashlib.sha256).hexdigest()


def current_session() -> DeskSession | None:
    """Return the request's session when its cookie is genuine, unexpired and its key still live."""
    raw = request.cookies.get(SESSION_COOKIE)
    if not raw:
        return None
    try:
        data = _serializer("session").loads(raw, max_age=SESSION_SECONDS)
    except BadSignature:
        return None
    if not isinstance(data, dict) or not isinstance(data.get("k"), str) or not isinstance(data.get("n"), str):
        return None
    key = keys.live_key(service_context().engine, data["k"])
    return None if key is None else DeskSession(key, data["n"])


def start_session(response: Response, key: KeyInfo) -> None:
    """Set the session cookie for ``key`` on ``response`` and drop the sign-in cookie."""
    value = _serializer("session").dumps({"k": key.id, "n": secrets.token_urlsafe(16)})
    _set(response, SESSION_COOKIE, value, SESSION_SECONDS)
    response.delete_cookie(SIGN_IN_COOKIE, path=PREFIX)


def end_session(response: Response) -> None:
    """Remove the session cookie (signing out)."""
    response.delete_cookie(SESSION_COOKIE, path=PREFIX, secure=request.is_secure, httponly=True, samesite="Lax")


def sign_in_nonce(response: Response | None = None) -> str:
    """Return the sign-in form's nonce: the pre-session cookie's, or a new one set on ``response``."""
    raw = request.cookies.get(SIGN_IN_COOKIE)
    if raw:
        try:
            nonce = _serializer("sign-in").loads(raw, max_age=SIGN_IN_SECONDS)
            if isinstance(nonce, str):
                return nonce
        except BadSignature:
            pass
    nonce = secrets.token_urlsafe(16)
    if response is not None:
        _set(response, SIGN_IN_COOKIE, _serializer("sign-in").dumps(nonce), SIGN_IN_SECONDS)
    return nonce


def csrf_matches(nonce: str) -> bool:
    """Whether the submitted form's CSRF token is the one of ``nonce``."""
    sent = request.form.get(CSRF_FIELD, "")
    return bool(sent) and hmac.compare_digest(sent, csrf_token(nonce))


def _set(response: Response, name: str, value: str, seconds: int) -> None:
    response.set_cookie(name, value, max_age=seconds, path=PREFIX, secure=request.is_secure, httponly=True,
                        samesite="Lax")


def safe_next(target: str | None) -> str:
    """Return ``target`` when it is a page of the desk on this server, else the desk's front page.

    Only a local path under /desk is followed after signing in: no scheme, no host, no ``//`` or
    backslash (which browsers read as another host), no control characters.
    """
    home = f"{PREFIX}/"
    if not target or len(target) > 2000:
        return home
    if "\\" in target or any(ord(c) < 0x20 or ord(c) == 0x7F for c in target):
        return home
    parts = urlsplit(target)
    if parts.scheme or parts.netloc or not target.startswith("/") or target.startswith("//"):
        return home
    if not (parts.path == PREFIX or parts.path.startswith(f"{PREFIX}/")):
        return home
    return target
