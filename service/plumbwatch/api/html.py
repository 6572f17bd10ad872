"""HTML responses for the pages: security headers, error pages, redirects, forms."""

from __future__ import annotations

from typing import Any
from urllib.parse import parse_qs, quote

from fastapi import Request
from starlette.responses import HTMLResponse, RedirectResponse, Response

from plumbwatch.api.page_auth import PageUser
from plumbwatch.errors import PlumbwatchError
from plumbwatch.web.render import render

# No inline script or style, no external anything; SVG colours are presentation
# attributes, which CSP does not treat as inline style.
CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
    "form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
)
HEADERS = {
    "Content-Security-Policy": CSP,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",
    "Cache-Control": "no-store",
    "X-Frame-Options": "DENY",
}
MAX_FORM_BYTES = 16 * 1024


def secure(response: Response) -> Response:
    response.headers.update(HEADERS)
    return response


def page(template: str, *, status: int = 200, **context: Any) -> Response:
    return secure(HTMLResponse(render(template, **context), status_code=status))


def error_page(user: PageUser | None, status: int, heading: str, message: str) -> Response:
    who = (user or PageUser("public")).context()
    if user is None:
        who["via"] = "public"
    return page(
        "error.html",
        status=status,
        title=heading,
        nav="",
        user=who,
        heading=heading,
        message=message,
    )


def domain_error(user: PageUser | None, exc: PlumbwatchError) -> Response:
    headings = {401: "Sign in needed", 403: "Not allowed", 404: "Not found", 409: "Conflict"}
    return error_page(user, exc.status, headings.get(exc.status, "Error"), exc.message)


def local_path(target: str | None, default: str = "/") -> str:
    """Only paths on this site, so a crafted link cannot send the browser elsewhere."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return default
    return target


def to_sign_in(request: Request) -> Response:
    target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return secure(RedirectResponse(f"/sign-in?next={quote(target, safe='')}", status_code=303))


def see_other(path: str) -> Response:
    return secure(RedirectResponse(local_path(path), status_code=303))


async def read_form(request: Request) -> dict[str, str] | None:
    """An urlencoded form body (first value of each field), or None if too large."""
    declared = request.headers.get("content-length")
    if declared and declared.isdigit() and int(declared) > MAX_FORM_BYTES:
        return None
    body = b""
    async for chunk in request.stream():
        body += chunk
        if len(body) > MAX_FORM_BYTES:
            return None
    fields = parse_qs(body.decode("utf-8", errors="replace"), keep_blank_values=True)
    return {k: v[0] for k, v in fields.items()}
