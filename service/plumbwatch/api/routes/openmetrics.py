"""GET /metrics: the latest evaluations and the service counters in OpenMetrics text."""

from __future__ import annotations

from fastapi import APIRouter, Request
from prometheus_client import CollectorRegistry
from prometheus_client.openmetrics.exposition import CONTENT_TYPE_LATEST, generate_latest
from starlette.responses import Response

from plumbwatch.api import alerts_source
from plumbwatch.api.auth import Principal
from plumbwatch.api.openmetrics import Snapshot, families
from plumbwatch.api.page_auth import page_user
from plumbwatch.api.page_data import Gatherer
from plumbwatch.api.schemas import errors
from plumbwatch.errors import AuthError
from plumbwatch.store import models as store_models

router = APIRouter(tags=["metrics"])


@router.get(
    "/metrics",
    response_class=Response,
    responses={200: {"content": {CONTENT_TYPE_LATEST: {}}}, **errors(401, 403)},
)
def metrics(request: Request) -> Response:
    """OpenMetrics text: per model, window and slice the key metrics, evidence and
    health (bounded by ``metrics_slice_cap``), and this server's counters. Read
    scope, or open with ``public_pages``."""
    user = page_user(request)
    if user is None:
        raise AuthError("send a read token: Authorization: Bearer <token>")
    principal: Principal | None = user.principal
    if principal is not None:
        principal.require("read", principal.token.model)
    state = request.app.state
    gather = state.gatherer
    with state.engine.connect() as conn:
        models = store_models.list_models(conn=conn)
        if user.model is not None:
            models = [m for m in models if m.name == user.model]
        records = []
        for m in models:
            latest = gather.latest(conn, m)
            records.append((m.name, latest[1] if latest else None))
        active: dict[str, int] = {}
        for a in Gatherer.alerts(conn, states=("active",)):
            active[str(a.get("model"))] = active.get(str(a.get("model")), 0) + 1
        deliveries = alerts_source.delivery_counts(conn) if user.model is None else None
    collected = families(
        records,
        slice_cap=state.settings.metrics_slice_cap,
        active_alerts=active,
        deliveries=deliveries,
    )
    registry = CollectorRegistry(auto_describe=False)
    registry.register(Snapshot([*collected, *state.telemetry.registry.collect()]))
    return Response(generate_latest(registry), media_type=CONTENT_TYPE_LATEST)
