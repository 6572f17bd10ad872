"""The alerts layer of one process: the evaluation hook and the delivery worker.

``plumbwatch serve`` runs the worker in a background thread whether or not the
evaluation scheduler is on: it expires shelves and sends queued deliveries every
``delivery_poll_interval``, and at once after an evaluation or an action (``wake``).
``plumbwatch evaluate`` runs one sending pass after its evaluations instead.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from typing import Any

import httpx
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.alerts.outbox import RetryPolicy, Sender
from plumbwatch.alerts.process import Context, expire_shelves, process_record
from plumbwatch.alerts.rules import Defaults
from plumbwatch.alerts.sinks import build_sinks
from plumbwatch.config import Settings
from plumbwatch.errors import PlumbwatchError
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel

log = logging.getLogger(__name__)


class Alerting:
    def __init__(
        self,
        engine: Engine,
        settings: Settings,
        *,
        holder: str,
        clock_us: Callable[[], int],
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.engine = engine
        self.sinks = build_sinks(settings, transport=transport)
        self.context = Context(
            Defaults.from_settings(settings), self.sinks.routing, settings.link_base
        )
        self.sender = Sender(engine, self.sinks, holder, RetryPolicy.from_settings(settings))
        self.poll_s = settings.seconds("delivery_poll_interval")
        self.clock_us = clock_us  # the service clock, for shelf expiry
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread: threading.Thread | None = None

    def after_record(
        self,
        conn: sa.Connection,
        model: MonitoredModel,
        evaluation_id: int,
        record: dict[str, Any],
        notify: bool,
    ) -> None:
        process_record(conn, model, evaluation_id, record, notify, ctx=self.context)

    def wake(self) -> None:
        self._wake.set()

    def run_pass(self) -> int:
        """Expire due shelves, then attempt every due delivery once; returns attempts."""
        now_us = self.clock_us()
        with self.engine.connect() as conn:
            due = store_alerts.any_shelf_due(conn, now_us=now_us)
        if due:
            with writing(self.engine) as write:
                expire_shelves(write, now_us=now_us)
        return self.sender.run_until_idle()

    def start(self) -> None:
        if self._thread is None:
            self._stop.clear()
            self._thread = threading.Thread(
                target=self._loop, name="plumbwatch-deliveries", daemon=True
            )
            self._thread.start()

    def stop(self, timeout_s: float = 30.0) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
            self._thread = None

    def _loop(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()  # before the pass: a wake during it starts the next one
            try:
                self.run_pass()
            except (sa.exc.SQLAlchemyError, PlumbwatchError, OSError) as exc:
                # The database may be briefly unreachable; queued rows wait for it.
                log.warning("delivery pass failed, next pass in %g s: %s", self.poll_s, exc)
            self._wake.wait(self.poll_s)
