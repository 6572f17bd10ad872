"""Service counters for /metrics: ingested rows, rejected batches, evaluation durations.

Each app has its own registry (tests build many apps in one process). Counters
count this process only; /metrics of every server together give the totals.
"""

from __future__ import annotations

import re
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Histogram
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from plumbwatch.store.models import MonitoredModel

_INGEST_PATH = re.compile(r"^/v1/models/[^/]+/(predictions|outcomes)$")

# Evaluation runs take from milliseconds to minutes: buckets spread over that range.
_DURATION_BUCKETS = (0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 120, 300, 600)


class Telemetry:
    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.rows_accepted = Counter(
            "plumbwatch_rows_accepted",
            "Rows in ingest batches answered 2xx by this server (duplicates included)",
            ["kind"],
            registry=self.registry,
        )
        self.rows_rejected = Counter(
            "plumbwatch_rows_rejected",
            "Rows in parsed ingest batches answered with an error (nothing of them stored)",
            ["kind"],
            registry=self.registry,
        )
        self.batches_rejected = Counter(
            "plumbwatch_batches_rejected",
            "Ingest requests answered with an error, parsed or not",
            ["kind"],
            registry=self.registry,
        )
        self.evaluation_seconds = Histogram(
            "plumbwatch_evaluation_duration_seconds",
            "Wall time of evaluation runs on this server",
            ["model"],
            buckets=_DURATION_BUCKETS,
            registry=self.registry,
        )
        for kind in ("predictions", "outcomes"):
            self.rows_accepted.labels(kind)
            self.rows_rejected.labels(kind)
            self.batches_rejected.labels(kind)

    def evaluated(self, model: MonitoredModel, seconds: float) -> None:
        self.evaluation_seconds.labels(model.name).observe(seconds)


def note_batch(scope: Scope, rows: int) -> None:
    """Called by the ingest routes once the batch is parsed (its row count is known)."""
    scope.setdefault("state", {})["ingest_rows"] = rows


class IngestCounter:
    """Pure ASGI middleware: counts ingest rows by the status of their answer."""

    def __init__(self, app: ASGIApp, telemetry: Telemetry) -> None:
        self.app = app
        self.telemetry = telemetry

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        match = _INGEST_PATH.match(scope.get("path", "")) if scope["type"] == "http" else None
        if match is None or scope.get("method") != "POST":
            await self.app(scope, receive, send)
            return
        status: dict[str, Any] = {}

        async def watch(message: Message) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, watch)
        finally:
            kind = match.group(1)
            rows = (scope.get("state") or {}).get("ingest_rows")
            code = status.get("code", 500)
            if code < 400:
                self.telemetry.rows_accepted.labels(kind).inc(rows or 0)
            else:
                self.telemetry.batches_rejected.labels(kind).inc()
                if rows:
                    self.telemetry.rows_rejected.labels(kind).inc(rows)
