"""Evidence streams: the admin reset after an acknowledged recalibration."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request

from plumbwatch.api.deps import EngineDep, PrincipalDep, SettingsDep, read_json
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import (
    EvidenceResetCreate,
    EvidenceResetRead,
    body,
    errors,
    inline_schema,
)
from plumbwatch.errors import Detail, InvalidInput
from plumbwatch.store import evidence as store_evidence
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import writing
from plumbwatch.timefmt import format_instant

router = APIRouter(prefix="/v1/models", tags=["evidence"])

MAX_REASON = 2_000


@router.post(
    "/{model}/evidence/reset",
    response_model=EvidenceResetRead,
    responses=errors(401, 403, 404, 409, 413, 422),
    openapi_extra=body(inline_schema(EvidenceResetCreate)),
)
async def reset_evidence(
    model: str, request: Request, engine: EngineDep, settings: SettingsDep, principal: PrincipalDep
) -> JsonResponse:
    """Restart every evidence stream of the model at E = 1 (after an acknowledged
    recalibration); the reason and the token's name are kept. A run in progress
    answers 409 and writes nothing; the next run starts the new streams."""
    principal.require("admin", model)
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model)
    data: Any = await read_json(request, max_bytes=settings.max_body_bytes)
    reason = data.get("reason") if isinstance(data, dict) else None
    if not isinstance(data, dict) or set(data) != {"reason"}:
        raise InvalidInput(
            'the body is {"reason": "..."}',
            [Detail(field="body", reason="unexpected shape or fields")],
        )
    if not isinstance(reason, str) or not reason.strip() or len(reason) > MAX_REASON:
        raise InvalidInput(
            "a reset needs a reason",
            [
                Detail(
                    field="reason", reason=f"a non-blank string of at most {MAX_REASON} characters"
                )
            ],
        )
    now_us = request.app.state.clock_us()
    with writing(engine) as write:
        streams = len(store_evidence.load_streams(write, model_id=found.id))
        done = store_evidence.reset(
            write, model_id=found.id, reason=reason.strip(), actor=principal.name, now_us=now_us
        )
    return JsonResponse(
        {
            "model": model,
            "reset_at": format_instant(done.reset_at_us),
            "reason": done.reason,
            "by": done.actor,
            "streams_reset": streams,
        }
    )
