"""What the predictions and outcomes routes share: model lookup, body limits, the writer."""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from fastapi import Request
from starlette.concurrency import run_in_threadpool

from plumbwatch.api.auth import Principal
from plumbwatch.api.deps import read_json
from plumbwatch.api.telemetry import note_batch
from plumbwatch.config import Settings
from plumbwatch.errors import TooLarge
from plumbwatch.store import models as store_models
from plumbwatch.store.models import MonitoredModel
from plumbwatch.validation import ModelShape


async def active_model(request: Request, principal: Principal, name: str) -> MonitoredModel:
    principal.require("ingest", name)
    engine = request.app.state.engine

    def lookup() -> MonitoredModel:
        with engine.connect() as conn:
            return store_models.get_or_raise(conn=conn, name=name)

    return await run_in_threadpool(lookup)


def shape(model: MonitoredModel) -> ModelShape:
    return ModelShape(
        kind=model.kind, classes=tuple(model.classes), segment_keys=frozenset(model.segment_keys)
    )


async def rows_of(request: Request, settings: Settings, key: str) -> Any:
    data = await read_json(request, max_bytes=settings.max_body_bytes)
    if isinstance(data, dict) and isinstance(data.get(key), list):
        n = len(data[key])
        note_batch(request.scope, n)
        if n > settings.max_batch_rows:
            raise TooLarge(
                f"{n} rows in one batch; the limit is {settings.max_batch_rows} "
                "(max_batch_rows setting): split the batch"
            )
    return data


async def write(request: Request, work: Callable[[sa.Connection], Any], rows: int) -> Any:
    future = request.app.state.writer.submit(work, rows=rows)
    return await asyncio.wrap_future(future)
