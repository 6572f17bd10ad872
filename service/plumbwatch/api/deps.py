"""Dependency aliases, so route signatures read as declarations."""

from __future__ import annotations

from typing import Annotated

import orjson
from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials
from sqlalchemy.engine import Engine

from plumbwatch.api.auth import Principal, authenticate, bearer
from plumbwatch.config import Settings
from plumbwatch.errors import Detail, InvalidInput, TooLarge


def _settings(request: Request) -> Settings:
    return request.app.state.settings


def _engine(request: Request) -> Engine:
    return request.app.state.engine


async def _principal(
    request: Request,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> Principal:
    return await authenticate(request, credentials)


SettingsDep = Annotated[Settings, Depends(_settings)]
EngineDep = Annotated[Engine, Depends(_engine)]
PrincipalDep = Annotated[Principal, Depends(_principal)]


async def read_json(request: Request, *, max_bytes: int) -> object:
    """The request's JSON body; 413 past ``max_bytes`` before anything is parsed."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > max_bytes:
        raise TooLarge(
            f"body of {declared} bytes exceeds the limit of {max_bytes} bytes "
            "(max_body_bytes setting); send smaller batches"
        )
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > max_bytes:
            raise TooLarge(
                f"body exceeds the limit of {max_bytes} bytes (max_body_bytes "
                "setting); send smaller batches"
            )
        chunks.append(chunk)
    raw = b"".join(chunks)
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise InvalidInput(
            "the body is not valid JSON", [Detail(field="body", reason=str(exc))]
        ) from None
