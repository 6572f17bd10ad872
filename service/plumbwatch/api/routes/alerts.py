"""Alerts: list, read one with its events, acknowledge, shelve."""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any

import sqlalchemy as sa
from fastapi import APIRouter, Path, Query, Request
from pydantic import BaseModel, ConfigDict
from starlette.concurrency import run_in_threadpool

from plumbwatch.alerts import actions
from plumbwatch.api.auth import Principal
from plumbwatch.api.deps import EngineDep, PrincipalDep, SettingsDep, read_json
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import body, errors, inline_schema
from plumbwatch.errors import Detail, InvalidInput
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import models as store_models
from plumbwatch.store.alerts import STATES, Alert
from plumbwatch.store.engine import writing
from plumbwatch.timefmt import parse_instant, to_micros

router = APIRouter(prefix="/v1/alerts", tags=["alerts"])

AlertId = Annotated[int, Path(ge=1, le=2**62, description="the alert's id")]


class AlertRead(BaseModel):
    id: int
    model: str
    rule: str
    slice: str
    version: str | None
    window: str | None
    state: str
    severity: str
    raised_at: str
    since: str
    acknowledged_by: str | None
    shelved_until: str | None
    cleared_at: str | None
    values: dict[str, Any]
    link: str


class AlertListRead(BaseModel):
    alerts: list[AlertRead]
    next_cursor: str | None


class AlertEventRead(BaseModel):
    event_id: str
    kind: str
    from_state: str | None
    to_state: str
    evaluation_id: int | None
    actor: str | None
    at: str


class AlertDetailRead(AlertRead):
    events: list[AlertEventRead]


class AcknowledgeCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ShelveCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")

    until: str


@router.get("", response_model=AlertListRead, responses=errors(401, 403, 404, 422))
def list_alerts(
    engine: EngineDep,
    principal: PrincipalDep,
    state: Annotated[
        str | None, Query(description="active, acknowledged, shelved, cleared, or open")
    ] = None,
    model: Annotated[str | None, Query(description="only this model's alerts")] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    cursor: Annotated[str | None, Query()] = None,
) -> JsonResponse:
    """Alerts, newest first."""
    bound = principal.token.model
    principal.require("read", model or bound)
    if state is not None and state not in (*STATES, "open"):
        raise InvalidInput(
            "unknown state",
            [Detail(field="state", reason=f"one of {', '.join((*STATES, 'open'))}")],
        )
    after = None
    if cursor is not None:
        if not cursor.isdigit() or len(cursor) > 19:
            raise InvalidInput(
                "cursor is not one this server issued",
                [Detail(field="cursor", reason="invalid cursor")],
            )
        after = int(cursor)
    with engine.connect() as conn:
        model_id = None
        name = model or bound
        if name is not None:
            model_id = store_models.get_or_raise(conn=conn, name=name, include_archived=True).id
        rows = store_alerts.list_alerts(
            conn, state=state, model_id=model_id, limit=limit + 1, after_id=after
        )
    page = rows[:limit]
    next_cursor = str(page[-1]["id"]) if len(rows) > limit else None
    return JsonResponse({"alerts": page, "next_cursor": next_cursor})


@router.get("/{alert_id}", response_model=AlertDetailRead, responses=errors(401, 403, 404, 422))
def get_alert(alert_id: AlertId, engine: EngineDep, principal: PrincipalDep) -> JsonResponse:
    """One alert with every event of its lifecycle."""
    principal.require("read", principal.token.model)
    with engine.connect() as conn:
        alert = store_alerts.get_or_raise(conn, alert_id=alert_id)
        principal.require("read", alert.model)
        events = store_alerts.list_events(conn, alert_id=alert_id)
    return JsonResponse({**alert.as_dict(), "events": events})


async def _prepare(
    request: Request,
    engine: Any,
    alert_id: int,
    principal: Principal,
    max_bytes: int,
    fields: set[str],
) -> dict[str, Any]:
    """Checks in the order of DESIGN.md's status precedence (401, 403, 404, 413, 422):
    the token, the alert and its model, then the body."""
    principal.require("admin", principal.token.model)

    def find() -> Alert:
        with engine.connect() as conn:
            return store_alerts.get_or_raise(conn, alert_id=alert_id)

    alert = await run_in_threadpool(find)
    principal.require("admin", alert.model)
    data: Any = await read_json(request, max_bytes=max_bytes) or {}
    if not isinstance(data, dict) or set(data) != fields:
        shape = "{" + ", ".join(f'"{f}": ...' for f in sorted(fields)) + "}"
        raise InvalidInput(
            f"the body is {shape}", [Detail(field="body", reason="unexpected shape or fields")]
        )
    return data


def _write_with(engine: Any, fn: Callable[[sa.Connection], dict[str, Any]]) -> dict[str, Any]:
    with writing(engine) as conn:  # the alert row is read, then written
        return fn(conn)


async def _act(
    request: Request, engine: Any, action: Callable[[sa.Connection, int], dict[str, Any]]
) -> JsonResponse:
    """Run a person's action on an alert in one write transaction, at the app's clock,
    then wake the sender for the event it queued."""
    state = request.app.state
    now_us = state.clock_us()
    result = await run_in_threadpool(_write_with, engine, lambda conn: action(conn, now_us))
    state.alerting.wake()
    return JsonResponse(result)


@router.post(
    "/{alert_id}/acknowledge",
    response_model=AlertRead,
    responses=errors(401, 403, 404, 409, 413, 422),
    openapi_extra=body(inline_schema(AcknowledgeCreate)),
)
async def acknowledge(
    alert_id: AlertId,
    request: Request,
    engine: EngineDep,
    settings: SettingsDep,
    principal: PrincipalDep,
) -> JsonResponse:
    """Acknowledge an alert; the token's name is recorded. Repeating it is harmless."""
    await _prepare(request, engine, alert_id, principal, settings.max_body_bytes, set())

    def run(conn: sa.Connection, now_us: int) -> dict[str, Any]:
        return actions.acknowledge(conn, alert_id=alert_id, actor=principal.name, now_us=now_us)

    return await _act(request, engine, run)


@router.post(
    "/{alert_id}/shelve",
    response_model=AlertRead,
    responses=errors(401, 403, 404, 409, 413, 422),
    openapi_extra=body(inline_schema(ShelveCreate)),
)
async def shelve(
    alert_id: AlertId,
    request: Request,
    engine: EngineDep,
    settings: SettingsDep,
    principal: PrincipalDep,
) -> JsonResponse:
    """Shelve an alert until a time (RFC 3339); then it takes its condition's state."""
    data = await _prepare(request, engine, alert_id, principal, settings.max_body_bytes, {"until"})
    try:
        until_us = to_micros(parse_instant(data["until"]))
    except ValueError as exc:
        raise InvalidInput(
            "until is not an RFC 3339 timestamp", [Detail(field="until", reason=str(exc))]
        ) from None

    def run(conn: sa.Connection, now_us: int) -> dict[str, Any]:
        return actions.shelve(
            conn, alert_id=alert_id, actor=principal.name, until_us=until_us, now_us=now_us
        )

    return await _act(request, engine, run)
