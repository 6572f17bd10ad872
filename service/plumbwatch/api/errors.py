"""One place where errors become the JSON error body of DESIGN.md.

``{"error": {"code": "...", "message": "...", "details": [{"index", "field", "reason"}]}}``
for domain errors, FastAPI's request validation, and Starlette's own HTTP errors.
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException

from plumbwatch.api.responses import JsonResponse
from plumbwatch.errors import AuthError, Detail, PlumbwatchError

log = logging.getLogger(__name__)

_HTTP_CODES = {
    400: "bad_request",
    401: "unauthorized",
    403: "forbidden",
    404: "not_found",
    405: "method_not_allowed",
    409: "conflict",
    413: "too_large",
    415: "unsupported_media_type",
    422: "invalid",
    503: "unavailable",
}


def error_body(code: str, message: str, details: list[Detail] | None = None) -> dict[str, Any]:
    return {
        "error": {"code": code, "message": message, "details": [d.as_dict() for d in details or []]}
    }


def _respond(
    status: int, body: dict[str, Any], headers: dict[str, str] | None = None
) -> JsonResponse:
    return JsonResponse(body, status_code=status, headers=headers)


async def _domain(_request: Request, exc: Exception) -> JsonResponse:
    assert isinstance(exc, PlumbwatchError)
    headers = {"WWW-Authenticate": "Bearer"} if isinstance(exc, AuthError) else None
    if exc.status >= 500:
        log.error("%s: %s", exc.code, exc.message)
    return _respond(exc.status, error_body(exc.code, exc.message, exc.details), headers)


def _field(loc: tuple[Any, ...]) -> tuple[int | None, str]:
    parts = [p for p in loc if p not in ("body", "query", "path", "header")]
    index = None
    if parts and isinstance(parts[0], int):
        index, parts = parts[0], parts[1:]
    return index, ".".join(str(p) for p in parts) or (loc[0] if loc else "")


async def _validation(_request: Request, exc: Exception) -> JsonResponse:
    assert isinstance(exc, RequestValidationError)
    details = []
    for err in exc.errors():
        index, field = _field(tuple(err.get("loc", ())))
        details.append(Detail(field=str(field), reason=str(err.get("msg", "invalid")), index=index))
    return _respond(422, error_body("invalid", "the request is invalid", details))


async def _http(_request: Request, exc: Exception) -> JsonResponse:
    assert isinstance(exc, StarletteHTTPException)
    code = _HTTP_CODES.get(exc.status_code, "error")
    message = exc.detail if isinstance(exc.detail, str) else code.replace("_", " ")
    return _respond(exc.status_code, error_body(code, message), dict(exc.headers or {}) or None)


async def _unexpected(_request: Request, exc: Exception) -> JsonResponse:
    log.exception("unexpected error", exc_info=exc)
    return _respond(500, error_body("internal", "internal error; the server log has details"))


def install(app: FastAPI) -> None:
    app.add_exception_handler(PlumbwatchError, _domain)
    app.add_exception_handler(RequestValidationError, _validation)
    app.add_exception_handler(StarletteHTTPException, _http)
    app.add_exception_handler(Exception, _unexpected)
