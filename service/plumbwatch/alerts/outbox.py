"""The sender: delivers queued events to their sinks, at least once, with retries.

Each pass claims a few due deliveries (``store.deliveries.claim``), sends them one by
one outside any transaction, and records the outcome. A failed attempt is retried
after an exponential backoff with jitter (initial delay doubling per attempt, capped,
then a random draw in [d/2, d], the "equal jitter" of common practice, so that many
servers do not retry in step). A delivery still failing ``max_age`` after its first
attempt is marked ``failed``: the status JSON and page show it.

The receiver deduplicates on the event id (``webhook-id``): a sender that dies after
sending but before recording the success sends the event again after its claim
expires. Clocks here are the wall clock of this server: delivery is real-world I/O.
"""

from __future__ import annotations

import logging
import random
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from sqlalchemy.engine import Engine

from plumbwatch.alerts.sinks import SinkError, Sinks
from plumbwatch.config import Settings
from plumbwatch.store import deliveries as store_deliveries
from plumbwatch.store.deliveries import Delivery
from plumbwatch.store.engine import writing

log = logging.getLogger("plumbwatch.alerts.outbox")

SECOND_US = 1_000_000


def wall_clock_us() -> int:
    return time.time_ns() // 1_000


@dataclass(frozen=True)
class RetryPolicy:
    initial_s: float = 10.0
    max_s: float = 600.0
    max_age_s: float = 86_400.0
    claim_s: float = 120.0
    timeout_s: float = 10.0

    @classmethod
    def from_settings(cls, settings: Settings) -> RetryPolicy:
        return cls(
            initial_s=settings.seconds("delivery_retry_initial"),
            max_s=settings.seconds("delivery_retry_max"),
            max_age_s=settings.seconds("delivery_max_age"),
            claim_s=settings.seconds("delivery_claim"),
            timeout_s=settings.seconds("delivery_timeout"),
        )

    def delay_s(self, attempts: int, rng: random.Random) -> float:
        """Wait after the ``attempts``-th failed attempt: capped doubling, equal jitter."""
        ceiling = min(self.max_s, self.initial_s * 2 ** min(attempts - 1, 60))
        return ceiling / 2 + rng.uniform(0, ceiling / 2)


@dataclass
class Sender:
    engine: Engine
    sinks: Sinks
    holder: str
    policy: RetryPolicy = field(default_factory=RetryPolicy)
    clock_us: Callable[[], int] = wall_clock_us
    rng: random.Random = field(default_factory=random.Random)
    batch: int = 10

    def run_once(self) -> int:
        """One pass: claim due deliveries, attempt each; returns how many were attempted."""
        now = self.clock_us()
        claim_us = int(self.policy.claim_s * SECOND_US)
        with self.engine.connect() as conn:
            if not store_deliveries.any_due(conn, now_us=now):
                return 0
        with writing(self.engine) as conn:
            claimed = store_deliveries.claim(
                conn, holder=self.holder, now_us=now, claim_us=claim_us, limit=self.batch
            )
        attempted = 0
        for i, delivery in enumerate(claimed):
            # Never send on a claim that could run out mid-attempt: another server may
            # take the row then. Give the rest back for the next pass.
            # An attempt may take a timeout per phase (connect, send, answer).
            margin = int((self.policy.timeout_s * 3 + 1) * SECOND_US)
            if self.clock_us() + margin > now + claim_us:
                with writing(self.engine) as conn:
                    store_deliveries.release(
                        conn, delivery_ids=[d.id for d in claimed[i:]], holder=self.holder
                    )
                break
            self._attempt(delivery)
            attempted += 1
        return attempted

    def run_until_idle(self, *, max_passes: int = 100) -> int:
        """Attempt everything due now (each delivery at most once per pass)."""
        total = 0
        for _ in range(max_passes):
            done = self.run_once()
            total += done
            if done == 0:
                break
        return total

    def _attempt(self, delivery: Delivery) -> None:
        sink = self.sinks.get(delivery.sink)
        error: str | None = None
        if sink is None:
            error = f"no sink named {delivery.sink!r} is configured on this server"
        else:
            try:
                sink.send(event_id=delivery.event_id, body=delivery.payload)
            except SinkError as exc:
                error = str(exc)
        now = self.clock_us()
        with writing(self.engine) as conn:
            if error is None:
                kept = store_deliveries.mark_delivered(
                    conn, delivery_id=delivery.id, holder=self.holder, now_us=now
                )
                log.info("delivered event %s to sink %s", delivery.event_id, delivery.sink)
            else:
                deadline = delivery.first_attempt_us + int(self.policy.max_age_s * SECOND_US)
                if now >= deadline:
                    kept = store_deliveries.mark_failed(
                        conn,
                        delivery_id=delivery.id,
                        holder=self.holder,
                        now_us=now,
                        error=error,
                    )
                    log.error(
                        "gave up delivering event %s to sink %s after %d attempts: %s",
                        delivery.event_id,
                        delivery.sink,
                        delivery.attempts,
                        error,
                    )
                else:
                    wait_us = int(self.policy.delay_s(delivery.attempts, self.rng) * SECOND_US)
                    # The last attempt happens at the deadline, not before it.
                    kept = store_deliveries.mark_retry(
                        conn,
                        delivery_id=delivery.id,
                        holder=self.holder,
                        next_attempt_us=min(now + wait_us, deadline),
                        error=error,
                    )
                    log.warning(
                        "delivery of event %s to sink %s failed (attempt %d), retrying: %s",
                        delivery.event_id,
                        delivery.sink,
                        delivery.attempts,
                        error,
                    )
        if not kept:
            log.warning(
                "claim on delivery %d of event %s ran out during the attempt; another "
                "server may send it again (receivers deduplicate on the event id)",
                delivery.id,
                delivery.event_id,
            )
