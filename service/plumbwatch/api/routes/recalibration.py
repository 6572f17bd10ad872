"""Recalibration advice of the latest evaluation."""

from __future__ import annotations

from fastapi import APIRouter

from plumbwatch.api.deps import EngineDep, PrincipalDep
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import RecalibrationRead, errors
from plumbwatch.errors import NotFound
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import models as store_models

router = APIRouter(prefix="/v1/models", tags=["recalibration"])


@router.get(
    "/{model}/recalibration", response_model=RecalibrationRead, responses=errors(401, 403, 404)
)
def get_recalibration(model: str, engine: EngineDep, principal: PrincipalDep) -> JsonResponse:
    """The map to apply (knots: interpolate linearly in logit), its cross-fitted gain and
    the verdict in plain words: recalibrate, retrain or no action."""
    principal.require("read", model)
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
        record = store_evaluations.latest(conn, model_id=found.id)
    if record is None:
        raise NotFound(
            f"model {model!r} has not been evaluated yet; POST /v1/models/{model}/evaluations "
            "or wait for the scheduler"
        )
    advice = record.get("recalibration")
    if advice is None:
        raise NotFound(
            f"no recalibration advice for model {model!r} as of {record['as_of']}: the current "
            "version has too few matured events in every window for a verdict (min_events)"
        )
    return JsonResponse(advice)
