"""One tick over every active model, and the lease that keeps replicas apart.

Several servers may share one PostgreSQL: each takes a model's lease before it
evaluates it, so a model is evaluated by one server at a time; a crashed run's
lease simply expires. The clock is read once per tick and passed down.
"""

from __future__ import annotations

import logging
import os
import socket
import uuid
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.engine import Engine

from plumbwatch.errors import Conflict, PlumbwatchError
from plumbwatch.evaluate.run import Options, evaluate_model
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import models as store_models
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

    def evaluate(self, model: MonitoredModel, *, as_of_us: int, now_us: int) -> dict[str, Any]:
        """Evaluate under the model's lease; Conflict if another server holds it."""
        name = f"evaluate:{model.id}"
        with self.engine.begin() as conn:
            taken = store_evaluations.acquire_lease(
                conn, name=name, holder=self.holder, now_us=now_us, ttl_us=LEASE_TTL_US
            )
        if not taken:
            raise Conflict(
                f"model {model.name!r} is being evaluated by another server; retry shortly"
            )
        try:
            return evaluate_model(
                self.engine, model, as_of_us=as_of_us, now_us=now_us, options=self.options
            )
        finally:
            with self.engine.begin() as conn:
                store_evaluations.release_lease(conn, name=name, holder=self.holder)

    def tick(self, *, now_us: int, model_name: str | None = None) -> dict[str, str]:
        """Evaluate every active model (or one) as of now; returns model -> outcome.

        A model that fails is logged and reported; the others still run.
        """
        with self.engine.connect() as conn:
            if model_name:
                models = [store_models.get_or_raise(conn=conn, name=model_name)]
            else:
                models = store_models.list_models(conn=conn)
        results = {}
        for model in models:
            try:
                record = self.evaluate(model, as_of_us=now_us, now_us=now_us)
            except PlumbwatchError as exc:
                log.warning("evaluation of %s skipped: %s", model.name, exc.message)
                results[model.name] = f"skipped: {exc.message}"
                continue
            results[model.name] = record["health"]
        return results
