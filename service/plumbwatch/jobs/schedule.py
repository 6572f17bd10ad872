"""APScheduler 3.x wiring: one in-memory job per server; leases decide who runs a model."""

from __future__ import annotations

import logging
from collections.abc import Callable

from apscheduler.schedulers.background import BackgroundScheduler

from plumbwatch.config import Settings
from plumbwatch.jobs.tick import Evaluator

log = logging.getLogger(__name__)


def start_scheduler(
    evaluator: Evaluator, settings: Settings, clock_us: Callable[[], int]
) -> BackgroundScheduler | None:
    """Start the evaluation tick every ``evaluation_interval`` unless ``scheduler = off``."""
    if settings.scheduler == "off":
        return None

    def tick() -> None:
        interval_us = int(settings.evaluation_interval_seconds * 1_000_000)
        results = evaluator.tick(now_us=clock_us(), interval_us=interval_us)
        log.info("evaluation tick: %s", results)

    scheduler = BackgroundScheduler(timezone="UTC")
    # Plain def job: runs in the scheduler's thread pool, off the event loop.
    scheduler.add_job(
        tick,
        "interval",
        seconds=settings.evaluation_interval_seconds,
        id="evaluate",
        replace_existing=True,
        coalesce=True,
        max_instances=1,
    )
    scheduler.start()
    return scheduler
