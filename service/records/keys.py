"""API keys: every key belongs to a team, has one role, and records whose it is.

A key's identity is the person or CI identity it acts for, unique within its team. Holdout budgets are
counted per identity, so an admin who mints a second key for the same identity adds no budget. A key
minted without one is an identity of its own (its id), as every key made before identities was.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine, select, update

from service.errors import InputError, NotFound, field_error
from service.ids import new_id, new_token, same_secret, token_hash
from service.records.engine import iso, utcnow
from service.records.tables import api_keys
from service.vocabulary import ROLES


@dataclass(frozen=True)
class KeyInfo:
    """Who is calling: the key's id, team, role and display name (never the token)."""

    id: str
    team: str
    role: str
    name: str
    identity: str = ""  # whose key it is; "" on keys without one, which are their own identity

    @property
    def budget_identity(self) -> str:
        """The identity whose holdout budget this key spends: its recorded one, or its own id."""
        return self.identity or self.id

    def can(self, role: str) -> bool:
        """Whether this key's role includes ``role``."""
        return ROLES.index(self.role) >= ROLES.index(role)


# A person's address or a CI job's name; never shaped like a key id, so it cannot stand for another key.
IDENTITY = re.compile(r"^(?!key_)[A-Za-z0-9][A-Za-z0-9._@+:-]{0,99}$")


def create_key(
    engine: Engine, team: str, role: str, name: str = "", identity: str | None = None,
) -> tuple[KeyInfo, str]:
    """Create a key and return it with its token; only the hash of the token is stored.

    ``identity``: whose key it is; a key for an identity that already has keys shares their budget.
    """
    if role not in ROLES:
        raise field_error(InputError, "/role", f"role must be one of {', '.join(ROLES)}, got {role!r}")
    team = team.strip()
    if not team or len(team) > 100:
        raise field_error(InputError, "/team", f"team must be 1 to 100 characters, got {team!r}")
    if identity is not None and not IDENTITY.match(identity):
        raise field_error(InputError, "/identity", (
            "identity must be 1 to 100 characters of letters, digits and . _ @ + : - (e.g. a person's address "
            f"or a CI job's name), starting with a letter or digit and not with 'key_', got {identity!r}"))
    token = new_token()
    info = KeyInfo(id=new_id("key"), team=team, role=role, name=name[:200], identity=identity or "")
    with engine.begin() as conn:
        conn.execute(
            api_keys.insert().values(
                id=info.id, team=info.team, role=info.role, name=info.name,
                token_hash=token_hash(token), created_at=utcnow(), identity=identity,
            )
        )
    return info, token


def _info(row: Any) -> KeyInfo:
    return KeyInfo(id=row.id, team=row.team, role=row.role, name=row.name, identity=row.identity or "")


def authenticate(engine: Engine, token: str) -> KeyInfo | None:
    """Return the live key for ``token``, or None.

    The lookup is by hash (an index hit, not a scan); the stored hash is then compared in constant
    time so the comparison itself leaks nothing about near-misses.
    """
    wanted = token_hash(token)
    with engine.connect() as conn:
        row = conn.execute(
            select(api_keys).where(api_keys.c.token_hash == wanted, api_keys.c.revoked_at.is_(None))
        ).first()
    if row is None or not same_secret(row.token_hash, wanted):
        return None
    return _info(row)


def revoke(engine: Engine, key_id: str) -> None:
    """Revoke a key; revoking twice is not an error, an unknown id is."""
    with engine.begin() as conn:
        result = conn.execute(
            update(api_keys).where(api_keys.c.id == key_id).values(revoked_at=utcnow())
        )
    if result.rowcount == 0:
        raise NotFound(f"no key {key_id!r}")


def live_keys_named(engine: Engine, team: str, name: str) -> list[KeyInfo]:
    """Return the team's live (not revoked) keys with exactly this name, oldest first."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(api_keys)
            .where(api_keys.c.team == team, api_keys.c.name == name, api_keys.c.revoked_at.is_(None))
            .order_by(api_keys.c.created_at, api_keys.c.id)
        ).all()
    return [_info(row) for row in rows]


def get_key(engine: Engine, key_id: str) -> KeyInfo | None:
    """Return a key by id, revoked or not."""
    with engine.connect() as conn:
        row = conn.execute(select(api_keys).where(api_keys.c.id == key_id)).first()
    return None if row is None else _info(row)


def live_key(engine: Engine, key_id: str) -> KeyInfo | None:
    """Return a key by id if it is not revoked, else None (a browser session re-checks it on every page)."""
    with engine.connect() as conn:
        row = conn.execute(select(api_keys).where(api_keys.c.id == key_id, api_keys.c.revoked_at.is_(None))).first()
    return None if row is None else _info(row)


def team_listing(engine: Engine, team: str) -> list[dict[str, object]]:
    """Return a team's keys (never a token or its hash), newest first, with when each was revoked."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(api_keys.c.id, api_keys.c.role, api_keys.c.name, api_keys.c.identity, api_keys.c.created_at,
                   api_keys.c.revoked_at)
            .where(api_keys.c.team == team).order_by(api_keys.c.created_at.desc(), api_keys.c.id)
        ).all()
    return [{"id": r.id, "role": r.role, "name": r.name, "identity": r.identity or r.id,
             "created_at": iso(r.created_at),
             "revoked_at": iso(r.revoked_at)} for r in rows]
