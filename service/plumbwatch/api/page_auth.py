"""Who is looking at a page: a Bearer header, a signed session cookie, or nobody.

The session cookie never holds the token. It holds the token's id, an expiry
and an HMAC over both, keyed by ``HMAC(session_key, stored token hash)``:

* a stolen cookie works on the pages only (it is no Bearer token for the API),
  and only until its expiry (at most ``SESSION_SECONDS``, never past the
  token's own expiry);
* revoking or replacing the token changes what the key is derived from, and
  every request checks the token is still usable, so its sessions end at once;
* without the server's ``session_key`` a copy of the token table cannot mint
  sessions. Set ``session_key`` (``PLUMBWATCH_SESSION_KEY``) when several
  servers share a database; without it each process draws a random key, so
  sessions end when it restarts.

The cookie is HttpOnly and SameSite=Strict, Secure when the page is served
over HTTPS. Forms that change state carry a CSRF token derived from the
session (``csrf_token``), checked with the Origin header when one is sent.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
from dataclasses import dataclass
from typing import Any

from fastapi import Request
from fastapi.security.utils import get_authorization_scheme_param

from plumbwatch.api.auth import Principal
from plumbwatch.store import tokens
from plumbwatch.store.tokens import Token

SESSION_COOKIE = "plumbwatch_session"
SIGN_IN_COOKIE = "plumbwatch_sign_in"  # the sign-in form's one-time nonce
SESSION_SECONDS = 12 * 3600
_VERSION = "v1"


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).decode().rstrip("=")


@dataclass(frozen=True)
class Sessions:
    key: bytes

    def _token_key(self, token_hash: str) -> bytes:
        return hmac.new(self.key, token_hash.encode(), hashlib.sha256).digest()

    def issue(self, token: Token, token_hash: str, *, now_us: int) -> tuple[str, int]:
        """The cookie value and its max-age in seconds."""
        now_s = now_us // 1_000_000
        expires = now_s + SESSION_SECONDS
        if token.expires_at_us is not None:
            expires = min(expires, token.expires_at_us // 1_000_000)
        message = f"{_VERSION}.{token.id}.{expires}"
        mac = _b64(hmac.new(self._token_key(token_hash), message.encode(), hashlib.sha256).digest())
        return f"{message}.{mac}", max(expires - now_s, 0)

    @staticmethod
    def parse(value: str) -> tuple[int, int] | None:
        parts = value.split(".")
        if (
            len(parts) != 4
            or parts[0] != _VERSION
            or not (parts[1].isdigit() and parts[2].isdigit())
        ):
            return None
        return int(parts[1]), int(parts[2])

    def check(self, value: str, token: Token, token_hash: str, *, now_us: int) -> bool:
        parsed = self.parse(value)
        if parsed is None or parsed[0] != token.id or parsed[1] * 1_000_000 <= now_us:
            return False
        message, _, mac = value.rpartition(".")
        expected = _b64(
            hmac.new(self._token_key(token_hash), message.encode(), hashlib.sha256).digest()
        )
        return hmac.compare_digest(mac, expected) and token.usable(now_us)

    def csrf_token(self, session_value: str) -> str:
        return _b64(hmac.new(self.key, b"csrf." + session_value.encode(), hashlib.sha256).digest())

    def nonce_matches(self, cookie: str | None, form: str | None) -> bool:
        return bool(cookie and form and hmac.compare_digest(cookie, form))


@dataclass(frozen=True)
class PageUser:
    via: str  # "cookie", "bearer" or "public"
    principal: Principal | None = None
    csrf: str = ""

    @property
    def name(self) -> str:
        return self.principal.name if self.principal else ""

    @property
    def scope(self) -> str:
        return self.principal.token.scope if self.principal else "public"

    @property
    def model(self) -> str | None:
        """The model a bound token is limited to."""
        return self.principal.token.model if self.principal else None

    @property
    def can_act(self) -> bool:
        """Admin actions from forms need a cookie session (its CSRF token) and scope admin."""
        return self.via == "cookie" and self.scope == "admin"

    def require_read(self, model: str | None = None) -> None:
        if self.principal is not None:
            self.principal.require("read", model if model is not None else self.model)

    def context(self) -> dict[str, Any]:
        return {
            "via": self.via,
            "name": self.name,
            "scope": self.scope,
            "csrf": self.csrf,
            "can_act": self.can_act,
        }


def sessions_of(request: Request) -> Sessions:
    return request.app.state.sessions


def _from_cookie(request: Request, value: str) -> Principal | None:
    state = request.app.state
    parsed = Sessions.parse(value)
    if parsed is None:
        return None
    now_us = state.clock_us()
    with state.engine.connect() as conn:
        found = tokens.get_with_hash(conn=conn, token_id=parsed[0])
    if found is None or not sessions_of(request).check(value, *found, now_us=now_us):
        return None
    return Principal(found[0])


def _from_header(request: Request, header: str) -> Principal | None:
    scheme, secret = get_authorization_scheme_param(header)
    if scheme.lower() != "bearer" or not secret:
        return None
    state = request.app.state
    with state.engine.connect() as conn:
        token = tokens.authenticate(conn=conn, secret=secret, now_us=state.clock_us())
    return Principal(token) if token else None


def page_user(request: Request) -> PageUser | None:
    """The viewer, or None when the page must send them to sign in (blocking: call
    it from a sync route, which FastAPI runs in its thread pool).

    A Bearer header wins over the cookie; an invalid one is not rescued by the
    cookie (the caller asked for that token). With ``public_pages`` a viewer
    with neither reads as ``public``.
    """
    header = request.headers.get("authorization")
    if header:
        principal = _from_header(request, header)
        return PageUser("bearer", principal) if principal else None
    cookie = request.cookies.get(SESSION_COOKIE)
    if cookie:
        principal = _from_cookie(request, cookie)
        if principal is not None:
            return PageUser("cookie", principal, sessions_of(request).csrf_token(cookie))
    if request.app.state.settings.public_pages:
        return PageUser("public")
    return None


def same_origin(request: Request) -> bool:
    """False when the browser says the form came from another origin."""
    origin = request.headers.get("origin")
    if origin is None or origin == "null":
        return origin is None
    host = request.headers.get("host", "")
    return origin in (f"{request.url.scheme}://{host}", f"http://{host}", f"https://{host}")


def cookie_flags(request: Request) -> dict[str, Any]:
    return {
        "httponly": True,
        "samesite": "strict",
        "secure": request.url.scheme == "https",
        "path": "/",
    }
