"""Assembles the FastAPI application from settings (no import-time configuration)."""

from __future__ import annotations

import logging
import secrets
import threading
import time
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from datetime import UTC, datetime

import sqlalchemy as sa
from fastapi import FastAPI
from sqlalchemy.engine import Engine
from starlette.staticfiles import StaticFiles

from plumbwatch import __version__
from plumbwatch.api import errors
from plumbwatch.api.page_auth import Sessions
from plumbwatch.api.page_data import Gatherer
from plumbwatch.api.routes import (
    alerts,
    evaluations,
    evidence,
    health,
    models,
    openmetrics,
    outcomes,
    pages,
    predictions,
    recalibration,
    sign_in,
)
from plumbwatch.api.telemetry import IngestCounter, Telemetry
from plumbwatch.config import Settings
from plumbwatch.evaluate.run import Options
from plumbwatch.jobs.alerting import Alerting
from plumbwatch.jobs.schedule import start_scheduler
from plumbwatch.jobs.tick import Evaluator, holder_name
from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import require_current
from plumbwatch.store.models import apply_declarations
from plumbwatch.store.writer import GroupWriter
from plumbwatch.timefmt import to_micros


def system_clock_us() -> int:
    return to_micros(datetime.now(UTC))


log = logging.getLogger(__name__)


def _warm_pages(app: FastAPI) -> None:
    started = time.perf_counter()
    try:
        warmed = pages.warm(app.state.gatherer, app.state.engine)
    except sa.exc.SQLAlchemyError as exc:  # pages then read on first view, as before
        log.warning("page warm-up stopped: %s", exc)
        return
    log.info("pages warmed for %d models in %.2f s", warmed, time.perf_counter() - started)


def create_app(
    settings: Settings,
    *,
    engine: Engine | None = None,
    clock_us: Callable[[], int] = system_clock_us,
) -> FastAPI:
    """Build the app. The schema must be current; TOML declarations are applied at start."""
    engine = engine or create_engine(
        settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        require_current(engine)
        apply_declarations(engine, settings.models, now_us=clock_us())
        app.state.writer.start()
        # Deliveries run whether or not the evaluation scheduler does.
        app.state.alerting.start()
        scheduler = start_scheduler(app.state.evaluator, settings, clock_us)
        # Off the request path: the first page view after a start finds the history read.
        warming = threading.Thread(target=_warm_pages, args=(app,), name="warm-pages", daemon=True)
        warming.start()
        try:
            yield
        finally:
            warming.join(timeout=10)
            if scheduler is not None:
                scheduler.shutdown(wait=True)
            app.state.alerting.stop()
            app.state.writer.stop()

    app = FastAPI(
        title="plumbwatch",
        version=__version__,
        description="Watches whether a classifier's probabilities still mean what they say.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.clock_us = clock_us
    app.state.writer = GroupWriter(engine)
    holder = holder_name()
    app.state.alerting = Alerting(engine, settings, holder=holder, clock_us=clock_us)
    app.state.telemetry = Telemetry()
    app.state.gatherer = Gatherer()
    # Without a configured key, sessions last as long as this process (page_auth.py).
    key = settings.session_key.encode() if settings.session_key else secrets.token_bytes(32)
    app.state.sessions = Sessions(key)
    app.state.evaluator = Evaluator(
        engine,
        holder,
        Options.from_settings(settings),
        retention_days=settings.retention_days,
        after_record=app.state.alerting.after_record,
        after_commit=app.state.alerting.wake,
        on_duration=app.state.telemetry.evaluated,
    )
    errors.install(app)
    for module in (
        health,
        models,
        predictions,
        outcomes,
        evaluations,
        evidence,
        recalibration,
        alerts,
    ):
        app.include_router(module.router)
    for module in (pages, sign_in, openmetrics):
        app.include_router(module.router)
    app.mount("/static", StaticFiles(packages=[("plumbwatch.web", "static")]), name="static")
    app.add_middleware(IngestCounter, telemetry=app.state.telemetry)
    return app
