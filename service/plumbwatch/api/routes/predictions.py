"""POST /v1/models/{model}/predictions."""

from __future__ import annotations

from fastapi import APIRouter, Request

from plumbwatch.api.deps import PrincipalDep, SettingsDep
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.routes._ingest import active_model, rows_of, shape, write
from plumbwatch.api.schemas import PREDICTIONS_CREATE, PredictionsRead, body, errors
from plumbwatch.store import keys
from plumbwatch.store.ingest import write_predictions
from plumbwatch.validation import validate_predictions

router = APIRouter(prefix="/v1/models", tags=["ingest"])


@router.post(
    "/{model}/predictions",
    response_model=PredictionsRead,
    responses=errors(401, 403, 404, 409, 413, 422, 503),
    openapi_extra=body(PREDICTIONS_CREATE),
)
async def post_predictions(
    model: str, request: Request, settings: SettingsDep, principal: PrincipalDep
) -> JsonResponse:
    """Store a batch of predictions: all rows or none. Repeats of stored ids with the
    same content count as duplicates; with different content the batch gets 409."""
    monitored = await active_model(request, principal, model)
    data = await rows_of(request, settings, "predictions")
    now_us = request.app.state.clock_us()
    rows, repeats = validate_predictions(
        data,
        shape(monitored),
        now_us=now_us,
        future_tolerance_us=settings.future_tolerance_micros,
        sum_tolerance=settings.probability_sum_tolerance,
        earliest_us=(
            now_us - settings.retention_days * 86_400_000_000 if settings.retention_days else None
        ),
    )
    hashes = keys.id_hashes(r.client_id for r in rows)  # here, not on the writer thread
    result = await write(
        request,
        lambda conn: write_predictions(
            conn, model_id=monitored.id, rows=rows, now_us=now_us, hashes=hashes
        ),
        len(rows),
    )
    return JsonResponse({"accepted": result.accepted, "duplicates": result.duplicates + repeats})
