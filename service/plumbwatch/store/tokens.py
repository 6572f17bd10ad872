"""API tokens: printed once at creation, stored only as a SHA-256 hash.

Tokens are 256-bit random strings, so an unsalted SHA-256 is a safe lookup key
(no dictionary to attack); the final comparison is constant-time anyway.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from plumbwatch.errors import Conflict, NotFound
from plumbwatch.store.tables import api_tokens as t
from plumbwatch.store.tables import monitored_models

SCOPES = ("admin", "ingest", "read")
PREFIX = "pw_"


@dataclass(frozen=True)
class Token:
    id: int
    name: str
    scope: str
    model: str | None
    model_id: int | None
    created_at_us: int
    expires_at_us: int | None
    revoked_at_us: int | None

    def usable(self, now_us: int) -> bool:
        if self.revoked_at_us is not None:
            return False
        return self.expires_at_us is None or now_us < self.expires_at_us


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def _select() -> sa.Select[Any]:
    return sa.select(t, monitored_models.c.name.label("model_name")).outerjoin(
        monitored_models, t.c.model_id == monitored_models.c.id
    )


def _from_row(row: sa.Row[Any]) -> Token:
    return Token(
        id=row.id,
        name=row.name,
        scope=row.scope,
        model=row.model_name,
        model_id=row.model_id,
        created_at_us=row.created_at_us,
        expires_at_us=row.expires_at_us,
        revoked_at_us=row.revoked_at_us,
    )


def create(
    *,
    conn: sa.Connection,
    name: str,
    scope: str,
    now_us: int,
    model_id: int | None = None,
    expires_at_us: int | None = None,
) -> tuple[Token, str]:
    """Store a new token; return it with the bare secret (never stored, shown once)."""
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {', '.join(SCOPES)}, not {scope!r}")
    if conn.execute(sa.select(t.c.id).where(t.c.name == name)).first():
        raise Conflict(f"a token named {name!r} exists; revoke it or choose another name")
    secret = PREFIX + secrets.token_urlsafe(32)
    conn.execute(
        sa.insert(t).values(
            name=name,
            scope=scope,
            model_id=model_id,
            token_hash=hash_token(secret),
            created_at_us=now_us,
            expires_at_us=expires_at_us,
        )
    )
    row = conn.execute(_select().where(t.c.name == name)).one()
    return _from_row(row), secret


def list_tokens(*, conn: sa.Connection) -> list[Token]:
    return [_from_row(row) for row in conn.execute(_select().order_by(t.c.name))]


def revoke(*, conn: sa.Connection, name: str, now_us: int) -> Token:
    row = conn.execute(_select().where(t.c.name == name)).first()
    if row is None:
        raise NotFound(f"no token named {name!r}")
    if row.revoked_at_us is None:
        conn.execute(sa.update(t).where(t.c.id == row.id).values(revoked_at_us=now_us))
    return _from_row(conn.execute(_select().where(t.c.name == name)).one())


def authenticate(*, conn: sa.Connection, secret: str, now_us: int) -> Token | None:
    """The usable token with this secret, or None (unknown, revoked or expired)."""
    digest = hash_token(secret)
    row = conn.execute(_select().where(t.c.token_hash == digest)).first()
    if row is None or not hmac.compare_digest(row.token_hash, digest):
        return None
    token = _from_row(row)
    return token if token.usable(now_us) else None


def get_with_hash(*, conn: sa.Connection, token_id: int) -> tuple[Token, str] | None:
    """The token with this id and its stored hash (browser sessions are signed with
    a key derived from it, so revoking or replacing the token ends them)."""
    row = conn.execute(_select().where(t.c.id == token_id)).first()
    return (_from_row(row), row.token_hash) if row else None
