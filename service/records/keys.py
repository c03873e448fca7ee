"""API keys: every key belongs to a team and has one role."""

from __future__ import annotations

from dataclasses import dataclass

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

    def can(self, role: str) -> bool:
        """Whether this key's role includes ``role``."""
        return ROLES.index(self.role) >= ROLES.index(role)


def create_key(engine: Engine, team: str, role: str, name: str = "") -> tuple[KeyInfo, str]:
    """Create a key and return it with its token; only the hash of the token is stored."""
    if role not in ROLES:
        raise field_error(InputError, "/role", f"role must be one of {', '.join(ROLES)}, got {role!r}")
    team = team.strip()
    if not team or len(team) > 100:
        raise field_error(InputError, "/team", f"team must be 1 to 100 characters, got {team!r}")
    token = new_token()
    info = KeyInfo(id=new_id("key"), team=team, role=role, name=name[:200])
    with engine.begin() as conn:
        conn.execute(
            api_keys.insert().values(
                id=info.id, team=info.team, role=info.role, name=info.name,
                token_hash=token_hash(token), created_at=utcnow(),
            )
        )
    return info, token


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
    return KeyInfo(id=row.id, team=row.team, role=row.role, name=row.name)


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
    return [KeyInfo(id=row.id, team=row.team, role=row.role, name=row.name) for row in rows]


def get_key(engine: Engine, key_id: str) -> KeyInfo | None:
    """Return a key by id, revoked or not."""
    with engine.connect() as conn:
        row = conn.execute(select(api_keys).where(api_keys.c.id == key_id)).first()
    return None if row is None else KeyInfo(id=row.id, team=row.team, role=row.role, name=row.name)


def live_key(engine: Engine, key_id: str) -> KeyInfo | None:
    """Return a key by id if it is not revoked, else None (a browser session re-checks it on every page)."""
    with engine.connect() as conn:
        row = conn.execute(select(api_keys).where(api_keys.c.id == key_id, api_keys.c.revoked_at.is_(None))).first()
    return None if row is None else KeyInfo(id=row.id, team=row.team, role=row.role, name=row.name)


def team_listing(engine: Engine, team: str) -> list[dict[str, object]]:
    """Return a team's keys (never a token or its hash), newest first, with when each was revoked."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(api_keys.c.id, api_keys.c.role, api_keys.c.name, api_keys.c.created_at, api_keys.c.revoked_at)
            .where(api_keys.c.team == team).order_by(api_keys.c.created_at.desc(), api_keys.c.id)
        ).all()
    return [{"id": r.id, "role": r.role, "name": r.name, "created_at": iso(r.created_at),
             "revoked_at": iso(r.revoked_at)} for r in rows]
