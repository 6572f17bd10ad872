"""Monitored models: declare (PUT), read, list, archive (DELETE)."""

from __future__ import annotations

import base64
import re
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool

from plumbwatch.api.deps import EngineDep, PrincipalDep, SettingsDep, read_json
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import ModelListRead, ModelRead, body, errors, inline_schema
from plumbwatch.declarations import NAME_PATTERN, ModelDeclaration
from plumbwatch.errors import Detail, InvalidInput
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel
from plumbwatch.timefmt import format_instant

router = APIRouter(prefix="/v1/models", tags=["models"])

ModelName = Annotated[str, "model name"]


def model_read(model: MonitoredModel) -> dict[str, Any]:
    return {
        "name": model.name,
        **model.declaration.model_dump(mode="json"),
        "created_at": format_instant(model.created_at_us),
        "updated_at": format_instant(model.updated_at_us),
        "archived_at": format_instant(model.archived_at_us) if model.archived_at_us else None,
    }


def _encode_cursor(name: str) -> str:
    return base64.urlsafe_b64encode(name.encode()).decode().rstrip("=")


def _decode_cursor(cursor: str) -> str:
    try:
        padded = cursor + "=" * (-len(cursor) % 4)
        return base64.b64decode(padded, altchars=b"-_", validate=True).decode()
    except (ValueError, UnicodeDecodeError):
        raise InvalidInput(
            "cursor is not one this server issued",
            [Detail(field="cursor", reason="invalid cursor")],
        ) from None


@router.get("", response_model=ModelListRead, responses=errors(401, 403, 422))
def list_models(
    engine: EngineDep,
    principal: PrincipalDep,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    cursor: Annotated[str | None, Query()] = None,
) -> JsonResponse:
    principal.require("read", principal.token.model)
    after = _decode_cursor(cursor) if cursor else None
    with engine.connect() as conn:
        found = store_models.list_models(conn=conn, after=after, limit=limit + 1)
    if principal.token.model is not None:
        found = [m for m in found if m.name == principal.token.model]
    page = found[:limit]
    next_cursor = _encode_cursor(page[-1].name) if len(found) > limit else None
    return JsonResponse({"models": [model_read(m) for m in page], "next_cursor": next_cursor})


@router.get("/{model}", response_model=ModelRead, responses=errors(401, 403, 404))
def get_model(model: ModelName, engine: EngineDep, principal: PrincipalDep) -> JsonResponse:
    principal.require("read", model)
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
    return JsonResponse(model_read(found))


def _declaration(data: object) -> ModelDeclaration:
    try:
        return ModelDeclaration.model_validate(data)
    except ValidationError as exc:
        details = [
            Detail(field=".".join(str(p) for p in err["loc"]) or "body", reason=err["msg"])
            for err in exc.errors()
        ]
        raise InvalidInput("the model declaration is invalid", details) from None


@router.put(
    "/{model}",
    response_model=ModelRead,
    status_code=200,
    responses={201: {"model": ModelRead}, **errors(401, 403, 409, 413, 422)},
    openapi_extra=body(inline_schema(ModelDeclaration)),
)
async def put_model(
    model: ModelName,
    request: Request,
    engine: EngineDep,
    settings: SettingsDep,
    principal: PrincipalDep,
) -> JsonResponse:
    principal.require("admin", model)
    data = await read_json(request, max_bytes=settings.max_body_bytes)
    if not re.match(NAME_PATTERN, model):
        raise InvalidInput(
            "invalid model name",
            [
                Detail(
                    field="model",
                    reason="1-200 letters, digits, '_', '.' or '-', starting with a "
                    "letter or digit",
                )
            ],
        )
    declaration = _declaration(data)
    now_us = request.app.state.clock_us()

    def write() -> tuple[MonitoredModel, bool]:
        with writing(engine) as conn:
            return store_models.upsert(
                conn=conn, name=model, declaration=declaration, now_us=now_us
            )

    saved, created = await run_in_threadpool(write)
    return JsonResponse(model_read(saved), status_code=201 if created else 200)


@router.delete("/{model}", response_model=ModelRead, responses=errors(401, 403, 404))
def archive_model(
    model: ModelName, request: Request, engine: EngineDep, principal: PrincipalDep
) -> JsonResponse:
    principal.require("admin", model)
    with writing(engine) as conn:
        archived = store_models.archive(conn=conn, name=model, now_us=request.app.state.clock_us())
    return JsonResponse(model_read(archived))
