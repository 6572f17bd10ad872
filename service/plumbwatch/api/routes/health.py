"""Open liveness and readiness probes."""

from __future__ import annotations

import sqlalchemy as sa
from fastapi import APIRouter

from plumbwatch.api.deps import EngineDep
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import HealthRead, errors
from plumbwatch.errors import PlumbwatchError
from plumbwatch.store.migrate import require_current

router = APIRouter(tags=["health"])


@router.get("/healthz", response_model=HealthRead)
def healthz() -> JsonResponse:
    """The process is up."""
    return JsonResponse({"status": "ok"})


@router.get("/readyz", response_model=HealthRead, responses=errors(503))
def readyz(engine: EngineDep) -> JsonResponse:
    """The database answers and its schema is current."""
    try:
        require_current(engine)  # SchemaBehindError answers 503 with the fixing command
    except sa.exc.SQLAlchemyError as exc:
        raise _Unavailable(f"database unreachable: {type(exc).__name__}") from None
    return JsonResponse({"status": "ready"})


class _Unavailable(PlumbwatchError):
    code = "unavailable"
    status = 503
