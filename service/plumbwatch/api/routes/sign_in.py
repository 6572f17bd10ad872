"""Sign-in for browsers: a form that takes a read or admin token and sets a signed
session cookie (see ``plumbwatch.api.page_auth`` for what the cookie holds)."""

from __future__ import annotations

import secrets
from typing import Annotated

from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from plumbwatch.api.html import error_page, local_path, page, read_form, see_other
from plumbwatch.api.page_auth import (
    SESSION_COOKIE,
    SESSION_SECONDS,
    SIGN_IN_COOKIE,
    PageUser,
    cookie_flags,
    page_user,
    same_origin,
    sessions_of,
)
from plumbwatch.store import tokens

router = APIRouter(include_in_schema=False)

_NONCE_SECONDS = 15 * 60


def _form(request: Request, *, next_url: str, message: str = "", status: int = 200) -> Response:
    nonce = secrets.token_urlsafe(24)
    response = page(
        "sign_in.html",
        status=status,
        title="Sign in",
        nav="",
        user=PageUser("anonymous").context(),
        nonce=nonce,
        next_url=local_path(next_url),
        message=message,
        session_hours=SESSION_SECONDS // 3600,
    )
    # Double submit: the form's nonce must match this cookie, which another site's
    # page cannot read or set (SameSite=Strict), so no one can sign you in as them.
    response.set_cookie(SIGN_IN_COOKIE, nonce, max_age=_NONCE_SECONDS, **cookie_flags(request))
    return response


@router.get("/sign-in")
def sign_in_form(request: Request, next: Annotated[str, Query(max_length=2000)] = "/") -> Response:
    return _form(request, next_url=next)


@router.post("/sign-in")
async def sign_in(request: Request) -> Response:
    form = await read_form(request)
    if form is None:
        return _form(request, next_url="/", message="The form is too large.", status=413)
    next_url = local_path(form.get("next"))
    nonce_ok = sessions_of(request).nonce_matches(
        request.cookies.get(SIGN_IN_COOKIE), form.get("nonce")
    )
    if not (nonce_ok and same_origin(request)):
        return _form(
            request,
            next_url=next_url,
            message="The sign-in form expired or came from another site; try again.",
            status=403,
        )
    secret = (form.get("token") or "").strip()
    state = request.app.state
    now_us = state.clock_us()

    def lookup() -> tuple[tokens.Token, str] | None:
        with state.engine.connect() as conn:
            token = tokens.authenticate(conn=conn, secret=secret, now_us=now_us) if secret else None
            return tokens.get_with_hash(conn=conn, token_id=token.id) if token else None

    found = await run_in_threadpool(lookup)
    if found is None:
        return _form(
            request,
            next_url=next_url,
            message="That token is unknown, revoked or expired.",
            status=401,
        )
    token, token_hash = found
    if token.scope not in ("read", "admin"):
        return _form(
            request,
            next_url=next_url,
            message=f"Token {token.name!r} has scope {token.scope!r}; pages need read or admin.",
            status=403,
        )
    value, max_age = sessions_of(request).issue(token, token_hash, now_us=now_us)
    response = see_other(next_url)
    response.set_cookie(SESSION_COOKIE, value, max_age=max_age, **cookie_flags(request))
    response.delete_cookie(SIGN_IN_COOKIE, **cookie_flags(request))
    return response


@router.post("/sign-out")
async def sign_out(request: Request) -> Response:
    form = await read_form(request) or {}
    user = await run_in_threadpool(page_user, request)
    stale = not (same_origin(request) and form.get("csrf") == (user.csrf if user else None))
    if user is not None and user.via == "cookie" and stale:
        return error_page(
            user,
            403,
            "Not allowed",
            "The form's CSRF token is stale; reload the page and try again.",
        )
    response = see_other("/sign-in")
    response.delete_cookie(SESSION_COOKIE, **cookie_flags(request))
    return response
