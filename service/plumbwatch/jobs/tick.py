"""One tick over every active model, and the lease that keeps replicas apart.

Several servers may share one PostgreSQL: each takes a model's lease before it
evaluates it, so a model is evaluated by one server at a time; a crashed run's
lease simply expires. The clock is read once per tick and passed down.
"""

from __future__ import annotations

import logging
import os
import socket
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.engine import Engine

from plumbwatch.errors import Conflict, PlumbwatchError
from plumbwatch.evaluate.cohorts import DAY_US
from plumbwatch.evaluate.run import AfterRecord, Options, evaluate_model
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import evidence as store_evidence
from plumbwatch.store import models as store_models
from plumbwatch.store import retention
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel

log = logging.getLogger(__name__)

LEASE_TTL_US = 10 * 60 * 1_000_000  # longer than any run; a crashed holder's lease expires


def holder_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


@dataclass
class Evaluator:
    engine: Engine
    holder: str
    options: Options = field(default_factory=Options)
    retention_days: int | None = None
    # Runs inside each evaluation's write transaction (the alerts layer plugs in here).
    after_record: AfterRecord | None = None
    # Runs after each evaluation committed (wakes the delivery sender).
    after_commit: Callable[[], None] | None = None
    # Told (model, seconds) after each completed run (the /metrics duration histogram).
    on_duration: Callable[[MonitoredModel, float], None] | None = None

    def evaluate(
        self, model: MonitoredModel, *, as_of_us: int, now_us: int, notify: bool = True
    ) -> dict[str, Any]:
        """Evaluate under the model's lease; Conflict if another server holds it."""
        record = self._evaluate(model, as_of_us=as_of_us, now_us=now_us, notify=notify)
        assert record is not None
        return record

    def _evaluate(
        self,
        model: MonitoredModel,
        *,
        as_of_us: int,
        now_us: int,
        unless_done_since: int | None = None,
        notify: bool = True,
    ) -> dict[str, Any] | None:
        """With ``unless_done_since``: None when a record with an as_of at or after it
        exists already (another server ran this tick)."""
        name = f"evaluate:{model.id}"
        with writing(self.engine) as conn:
            taken = store_evaluations.acquire_lease(
                conn, name=name, holder=self.holder, now_us=now_us, ttl_us=LEASE_TTL_US
            )
        if not taken:
            raise Conflict(
                f"model {model.name!r} is being evaluated by another server; retry shortly"
            )
        try:
            if unless_done_since is not None:
                with self.engine.connect() as conn:
                    last = store_evaluations.latest_as_of(conn, model_id=model.id)
                if last is not None and last >= unless_done_since:
                    return None
            started = time.perf_counter()
            record = evaluate_model(
                self.engine,
                model,
                as_of_us=as_of_us,
                now_us=now_us,
                options=self.options,
                notify=notify,
                after_record=self.after_record,
            )
            if self.after_commit is not None:
                self.after_commit()
            if self.on_duration is not None:
                self.on_duration(model, time.perf_counter() - started)
            return record
        finally:
            with writing(self.engine) as conn:
                store_evaluations.release_lease(conn, name=name, holder=self.holder)

    def prune(self, model: MonitoredModel, *, now_us: int, batch: int = 5_000) -> int:
        """Prune raw rows past the retention, in short transactions, never rows the
        evaluation has not applied yet."""
        assert self.retention_days is not None
        with self.engine.connect() as conn:
            cursor = store_sketches.get_cursor(conn, model_id=model.id)
        if cursor is None:
            return 0
        frontier = cursor.as_of_us - model.declaration.label_horizon_seconds * 1_000_000
        with self.engine.connect() as conn:
            evidence = store_evidence.get_cursor(conn, model_id=model.id)
        # Evidence lags the sketches by its grace: never prune a row it has not been fed.
        frontier = min(frontier, evidence.frontier_us if evidence else frontier)
        before = min(now_us - self.retention_days * DAY_US, frontier)
        total = 0
        while True:
            with writing(self.engine) as conn:
                done = retention.prune_batch(conn, model_id=model.id, before_us=before, batch=batch)
            total += done
            if done < batch:
                return total

    def tick(
        self,
        *,
        now_us: int,
        model_name: str | None = None,
        interval_us: int | None = None,
        notify: bool = True,
    ) -> dict[str, str]:
        """Evaluate every active model (or one); returns model -> outcome.

        With ``interval_us`` (the scheduler) the tick is aligned to the interval: its
        as_of is the start of the current slot, and a model that another server
        already evaluated for this slot is skipped, so N servers evaluate each model
        once per tick. Without it (the command) the as_of is now.
        A model that fails is logged and reported; the others still run.
        """
        as_of_us = now_us - now_us % interval_us if interval_us else now_us
        with self.engine.connect() as conn:
            if model_name:
                models = [store_models.get_or_raise(conn=conn, name=model_name)]
            else:
                models = store_models.list_models(conn=conn)
        results = {}
        for model in models:
            try:
                record = self._evaluate(
                    model,
                    as_of_us=as_of_us,
                    now_us=now_us,
                    unless_done_since=as_of_us if interval_us else None,
                    notify=notify,
                )
            except PlumbwatchError as exc:
                log.warning("evaluation of %s skipped: %s", model.name, exc.message)
                results[model.name] = f"skipped: {exc.message}"
                continue
            results[model.name] = record["health"] if record else "done by another server"
            if self.retention_days is not None and record is not None:
                pruned = self.prune(model, now_us=now_us)
                if pruned:
                    log.info("pruned %d raw predictions of %s", pruned, model.name)
        return results
