"""HTML pages: ``/`` (every model), ``/models/{model}``, ``/alerts``, and the alert
actions their forms post (acknowledge, shelve; admin, CSRF-checked)."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated, Any

import sqlalchemy as sa
from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from plumbwatch.api import alerts_source
from plumbwatch.api.html import (
    domain_error,
    error_page,
    local_path,
    page,
    read_form,
    see_other,
    to_sign_in,
)
from plumbwatch.api.page_auth import PageUser, page_user, same_origin
from plumbwatch.api.page_data import Gatherer
from plumbwatch.errors import Forbidden, PlumbwatchError
from plumbwatch.store import history
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel
from plumbwatch.timefmt import from_micros, parse_duration
from plumbwatch.web import views
from plumbwatch.web.model_page import charts, model_page
from plumbwatch.web.render import compile_all

router = APIRouter(include_in_schema=False)


def _gatherer(request: Request) -> Gatherer:
    return request.app.state.gatherer


def _now(request: Request) -> datetime:
    return from_micros(request.app.state.clock_us()).astimezone(UTC)


def _declared(model: MonitoredModel) -> dict[str, Any]:
    d = model.declaration
    return {
        "name": model.name,
        "kind": d.kind,
        "description": d.description or "",
        "label_horizon": d.label_horizon,
        "missing_outcome": d.missing_outcome,
        "windows": list(d.windows),
    }


@router.get("/")
def overview(request: Request) -> Response:
    user = page_user(request)
    if user is None:
        return to_sign_in(request)
    try:
        user.require_read()
    except PlumbwatchError as exc:
        return domain_error(user, exc)
    gather = _gatherer(request)
    rows = []
    with request.app.state.engine.connect() as conn:
        models = store_models.list_models(conn=conn)
        if user.model is not None:
            models = [m for m in models if m.name == user.model]
        active = Gatherer.alerts(conn, states=("active",))
        for m in models:
            latest = gather.latest(conn, m)
            version = history.current_version(conn, model_id=m.id)
            baseline = gather.baseline(conn, m, *latest, version) if latest else None
            rows.append(
                {
                    **_declared(m),
                    "version": version,
                    "record": latest[1] if latest else None,
                    "baseline": baseline,
                    "active_alerts": [a for a in active if a.get("model") == m.name],
                }
            )
    return page(
        "overview.html",
        title="Models",
        nav="overview",
        user=user.context(),
        view=views.overview(rows, now=_now(request)),
    )


@router.get("/models/{model}")
def model_detail(
    request: Request,
    model: str,
    slice: Annotated[str, Query(max_length=2000)] = "overall",
    window: Annotated[str | None, Query(max_length=64)] = None,
    sort: Annotated[str, Query(max_length=64)] = "health",
    dir: Annotated[str, Query(max_length=8)] = "asc",
) -> Response:
    user = page_user(request)
    if user is None:
        return to_sign_in(request)
    gather = _gatherer(request)
    try:
        user.require_read(model)
        with request.app.state.engine.connect() as conn:
            found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
            data = model_data(gather, conn, found, slice=slice, window=window, sort=sort, dir=dir)
    except PlumbwatchError as exc:
        return domain_error(user, exc)
    view = model_page(data, now=_now(request))
    return page(
        "model.html",
        title=model,
        nav="overview",
        user=user.context(),
        v=view,
        shelve_choices=views.SHELVE_CHOICES,
    )


def model_data(
    gather: Gatherer,
    conn: sa.Connection,
    found: MonitoredModel,
    *,
    slice: str = "overall",
    window: str | None = None,
    sort: str = "health",
    dir: str = "asc",
) -> dict[str, Any]:
    """Everything the model page shows, from the caches where they hold it."""
    version = history.current_version(conn, model_id=found.id)
    latest = gather.latest(conn, found)
    data: dict[str, Any] = {
        "model": {**_declared(found), "version": version},
        "record": None,
        "slice": slice,
        "window": window,
        "sort": sort,
        "dir": dir,
        "alerts": gather.alerts(conn, model_id=found.id),
    }
    if latest is None:
        return data
    eid, record = latest
    baseline = gather.baseline(conn, found, eid, record, version)
    figures = gather.figures(conn, found, eid, record, slice, baseline)
    trend = gather.trend(conn, found, record)
    data.update(
        record=record,
        baseline=baseline,
        reliability=figures["reliability"],
        distribution=_with_drift(figures["distribution"], record, slice),
        coverage=figures["coverage"],
        history=_history(trend, record, slice),
    )
    # Charts depend on the run and the slice only: drawn once per pair.
    data["charts"] = gather.cache.get_or_compute(
        ("charts", eid, slice, tuple(p.as_of for p in trend)), lambda: charts(data)
    )
    return data


def warm(gather: Gatherer, engine: sa.Engine) -> int:
    """Compile the templates and draw each model's page for its overall slice, so the
    first visitor after a start finds the history read and the charts drawn."""
    compile_all()
    with engine.connect() as conn:
        models = store_models.list_models(conn=conn)
        for found in models:
            model_data(gather, conn, found)
    return len(models)


def _with_drift(dist: dict[str, Any] | None, record: dict[str, Any], slice_name: str) -> Any:
    if not dist:
        return dist
    entry = views.find_slice(views.first_window(record, dist.get("window")), slice_name)
    return {**dist, "metrics": entry.get("metrics") or {}}


def _history(trend: list[Any], record: dict[str, Any], slice_name: str) -> list[dict[str, Any]]:
    windows = [w.get("window") for w in record.get("windows") or []]
    out = []
    for point in trend:
        values = {w: point.get(w, slice_name) for w in windows}
        out.append({"as_of": point.as_of, "windows": {w: v for w, v in values.items() if v}})
    return out


@router.get("/alerts")
def alerts_page(request: Request) -> Response:
    user = page_user(request)
    if user is None:
        return to_sign_in(request)
    try:
        user.require_read()
        with request.app.state.engine.connect() as conn:
            model_id = None
            if user.model is not None:
                model_id = store_models.get_or_raise(conn=conn, name=user.model).id
            found = Gatherer.alerts(conn, model_id=model_id)
    except PlumbwatchError as exc:
        return domain_error(user, exc)
    return page(
        "alerts.html",
        title="Alerts",
        nav="alerts",
        user=user.context(),
        groups=views.alert_groups(found, now=_now(request)),
        shelve_choices=views.SHELVE_CHOICES,
    )


async def _act(request: Request, alert_id: int, action: str) -> Response:
    form = await read_form(request)
    user = await run_in_threadpool(page_user, request)
    if user is None:
        return to_sign_in(request)
    if form is None:
        return error_page(user, 413, "Too large", "The form is larger than any this page sends.")
    if user.principal is None or user.scope != "admin":
        return error_page(
            user, 403, "Not allowed", "Acknowledging and shelving alerts needs an admin token."
        )
    if user.via == "cookie" and not (
        same_origin(request) and form.get("csrf") == user.csrf and user.csrf
    ):
        return error_page(
            user,
            403,
            "Not allowed",
            "The form's CSRF token is missing or stale; reload the page and try again.",
        )
    state = request.app.state
    now_us = state.clock_us()
    until_us = None
    if action == "shelve":
        try:
            until_us = now_us + int(
                parse_duration(form.get("for") or "").total_seconds() * 1_000_000
            )
        except ValueError:
            return error_page(user, 422, "Invalid", "Choose how long to shelve the alert for.")
    principal = user.principal

    def run() -> None:
        with writing(state.engine) as conn:
            if principal.token.model_id is not None:
                mine = alerts_source.list_alerts(
                    conn, model_id=principal.token.model_id, after_id=alert_id - 1, limit=1
                )
                if not mine or mine[0].get("id") != alert_id:
                    raise Forbidden(
                        f"token {principal.name!r} is bound to model "
                        f"{principal.token.model!r}; alert {alert_id} is not one of its alerts"
                    )
            if action == "acknowledge":
                alerts_source.acknowledge(
                    conn, alert_id=alert_id, actor=principal.name, now_us=now_us
                )
            else:
                assert until_us is not None
                alerts_source.shelve(
                    conn, alert_id=alert_id, actor=principal.name, until_us=until_us, now_us=now_us
                )

    try:
        await run_in_threadpool(run)
    except PlumbwatchError as exc:
        return domain_error(user, exc)
    return see_other(local_path(form.get("next"), "/alerts"))


@router.post("/alerts/{alert_id}/acknowledge")
async def acknowledge(request: Request, alert_id: int) -> Response:
    return await _act(request, alert_id, "acknowledge")


@router.post("/alerts/{alert_id}/shelve")
async def shelve(request: Request, alert_id: int) -> Response:
    return await _act(request, alert_id, "shelve")


__all__ = ["PageUser", "router"]
