"""POST /v1/models/{model}/outcomes[?correction=true]."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request

from plumbwatch.api.deps import PrincipalDep, SettingsDep
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.routes._ingest import active_model, rows_of, shape, write
from plumbwatch.api.schemas import OUTCOMES_CREATE, OutcomesRead, body, errors
from plumbwatch.store import keys
from plumbwatch.store.ingest import write_outcomes
from plumbwatch.validation import validate_outcomes

router = APIRouter(prefix="/v1/models", tags=["ingest"])


@router.post(
    "/{model}/outcomes",
    response_model=OutcomesRead,
    responses=errors(401, 403, 404, 409, 413, 422, 503),
    openapi_extra=body(OUTCOMES_CREATE),
)
async def post_outcomes(
    model: str,
    request: Request,
    settings: SettingsDep,
    principal: PrincipalDep,
    correction: Annotated[
        bool, Query(description="replace stored values, keeping the old")
    ] = False,
) -> JsonResponse:
    """Store a batch of outcomes. Outcomes may arrive before their predictions; a
    different value for a stored outcome needs ``?correction=true``, else 409."""
    monitored = await active_model(request, principal, model)
    data = await rows_of(request, settings, "outcomes")
    now_us = request.app.state.clock_us()
    rows, repeats = validate_outcomes(
        data,
        shape(monitored),
        now_us=now_us,
        future_tolerance_us=settings.future_tolerance_micros,
    )
    hashes = keys.id_hashes(r.client_id for r in rows)  # here, not on the writer thread
    result = await write(
        request,
        lambda conn: write_outcomes(
            conn,
            model_id=monitored.id,
            rows=rows,
            now_us=now_us,
            correction=correction,
            hashes=hashes,
        ),
        len(rows),
    )
    return JsonResponse(
        {
            "accepted": result.accepted,
            "duplicates": result.duplicates + repeats,
            "corrections": result.corrections,
            "awaiting_prediction": result.awaiting_prediction,
        }
    )
