"""Bearer-token authentication and scope checks.

Scopes: ``read`` (GET endpoints and pages), ``ingest`` (POST predictions and
outcomes; cannot read), ``admin`` (everything). A token bound to one model gets
403 on any other model. 401 means no usable token; 403 a usable token that may
not do this.
"""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.concurrency import run_in_threadpool

from plumbwatch.errors import AuthError, Forbidden
from plumbwatch.store import tokens
from plumbwatch.store.tokens import Token

bearer = HTTPBearer(auto_error=False, description="an API token from `plumbwatch token create`")

_ALLOWED = {"read": {"read", "admin"}, "ingest": {"ingest", "admin"}, "admin": {"admin"}}


@dataclass(frozen=True)
class Principal:
    token: Token

    @property
    def name(self) -> str:
        return self.token.name

    def require(self, need: str, model: str | None = None) -> None:
        if self.token.scope not in _ALLOWED[need]:
            raise Forbidden(
                f"token {self.token.name!r} has scope {self.token.scope!r}; "
                f"this needs {' or '.join(sorted(_ALLOWED[need]))}"
            )
        if self.token.model is not None and model != self.token.model:
            target = f"model {model!r}" if model else "calls outside its model"
            raise Forbidden(
                f"token {self.token.name!r} is bound to model {self.token.model!r}, not {target}"
            )


async def authenticate(
    request: Request, credentials: HTTPAuthorizationCredentials | None
) -> Principal:
    if credentials is None or credentials.scheme.lower() != "bearer" or not credentials.credentials:
        raise AuthError("send an API token: Authorization: Bearer <token>")
    state = request.app.state
    now_us = state.clock_us()

    def lookup() -> Token | None:
        with state.engine.connect() as conn:
            return tokens.authenticate(conn=conn, secret=credentials.credentials, now_us=now_us)

    token = await run_in_threadpool(lookup)
    if token is None:
        raise AuthError("the token is unknown, revoked or expired")
    return Principal(token)
