"""The outbox and its sender on both engines: backoff with jitter, giving up after the
maximum age (visible in the status JSON), claims that keep two senders apart, and a
sender that dies mid-send."""

from __future__ import annotations

import random
import threading
import time
from collections import Counter
from dataclasses import dataclass, field

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.alerts.events import record_event
from plumbwatch.alerts.outbox import RetryPolicy, Sender
from plumbwatch.alerts.sinks import Routing, SinkError, Sinks
from plumbwatch.alerts.status import overlay
from plumbwatch.declarations import ModelDeclaration
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import deliveries as store_deliveries
from plumbwatch.store import models as store_models
from plumbwatch.store.tables import deliveries

S = 1_000_000


@dataclass
class Memory:
    """A sink that records what it was given; it can fail the first calls."""

    name: str = "memory"
    fail_first: int = 0
    pause_s: float = 0.0
    calls: list[str] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def send(self, *, event_id: str, body: str) -> None:
        with self.lock:
            self.calls.append(event_id)
            number = len(self.calls)
        if self.pause_s:
            time.sleep(self.pause_s)
        if number <= self.fail_first:
            raise SinkError("the receiver answered HTTP 503")


class Clock:
    def __init__(self, start: int = 1_000 * S) -> None:
        self.now = start

    def __call__(self) -> int:
        return self.now


def queue(engine: Engine, n: int, sinks: list[str]) -> list[str]:
    """n alerts, each with one raised event queued for ``sinks``; returns event ids."""
    decl = ModelDeclaration.model_validate({"kind": "binary", "label_horizon": "P1D"})
    ids = []
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name="late", declaration=decl, now_us=0)
        for i in range(n):
            alert = store_alerts.create(
                conn,
                model_id=model.id,
                rule="r",
                slice_name=f"zone:z{i:02d}",
                version=None,
                window="P7D",
                severity="critical",
                values={"i": i},
                sinks=sinks,
                link="http://127.0.0.1:8000/models/late",
                now_us=0,
            )
            ids.append(
                record_event(conn, alert=alert, kind="raised", from_state=None, at_us=0, send=True)
            )
    return ids


def states(engine: Engine) -> list[tuple[str, int]]:
    with engine.connect() as conn:
        return [
            (r.state, r.attempts)
            for r in conn.execute(sa.select(deliveries).order_by(deliveries.c.id))
        ]


def sender(
    engine: Engine, sink: object, clock: Clock, holder: str = "a", **policy: float
) -> Sender:
    sinks = Sinks({"memory": sink}, Routing(("memory",)))  # type: ignore[dict-item]
    return Sender(
        engine, sinks, holder, RetryPolicy(**policy), clock_us=clock, rng=random.Random(7)
    )


def test_backoff_doubles_to_its_cap_with_jitter_in_the_upper_half() -> None:
    policy = RetryPolicy(initial_s=10, max_s=600)
    rng = random.Random(1)
    for attempts, ceiling in [(1, 10), (2, 20), (3, 40), (6, 320), (7, 600), (40, 600)]:
        draws = [policy.delay_s(attempts, rng) for _ in range(2000)]
        assert ceiling / 2 <= min(draws) and max(draws) <= ceiling
        # uniform on [c/2, c]: mean 3c/4, a spread of draws rather than one value
        assert sum(draws) / len(draws) == pytest.approx(0.75 * ceiling, rel=0.02)


def test_retries_until_delivered(engine: Engine) -> None:
    (event,) = queue(engine, 1, ["memory"])
    sink, clock = Memory(fail_first=2), Clock()
    s = sender(engine, sink, clock, initial_s=10, max_s=600)
    assert s.run_once() == 1 and states(engine) == [("pending", 1)]
    assert s.run_once() == 0  # not due yet
    clock.now += 10 * S
    assert s.run_once() == 1 and states(engine) == [("pending", 2)]
    clock.now += 20 * S
    assert s.run_once() == 1 and states(engine) == [("delivered", 3)]
    assert sink.calls == [event] * 3
    clock.now += 3600 * S
    assert s.run_once() == 0


def test_gives_up_after_the_maximum_age_and_the_status_shows_it(engine: Engine) -> None:
    queue(engine, 1, ["memory"])
    sink, clock = Memory(fail_first=10**6), Clock()
    s = sender(engine, sink, clock, initial_s=60, max_s=600, max_age_s=1800)
    start = clock.now
    while states(engine)[0][0] == "pending":
        clock.now += 30 * S
        s.run_once()
        assert clock.now - start < 3600 * S
    ((state, attempts),) = states(engine)
    assert state == "failed" and attempts >= 4
    # the last attempt happens at the deadline, not later
    with engine.connect() as conn:
        row = conn.execute(sa.select(deliveries)).one()
        summary = store_deliveries.model_summary(conn, model_id=1)
        status = overlay(conn, model_id=1, record={"model": "late"})
    assert row.last_attempt_us - row.first_attempt_us <= 1800 * S + 30 * S
    assert summary["failed"] == 1 and summary["pending"] == 0
    (failure,) = summary["failures"]
    assert failure["error"] == "the receiver answered HTTP 503" and failure["sink"] == "memory"
    assert status["deliveries"]["failed"] == 1 and status["alerts"][0]["state"] == "active"
    with engine.connect() as conn:
        assert store_deliveries.counts(conn) == {
            "pending": 0,
            "delivered": 0,
            "failed": 1,
            "attempts": attempts,
        }


def test_an_unconfigured_sink_fails_visibly(engine: Engine) -> None:
    queue(engine, 1, ["pager"])
    clock = Clock()
    s = sender(engine, Memory(), clock, max_age_s=0)
    s.run_once()
    with engine.connect() as conn:
        (failure,) = store_deliveries.model_summary(conn, model_id=1)["failures"]
    assert failure["error"] == "no sink named 'pager' is configured on this server"


def test_a_sender_that_dies_mid_send_is_replaced_after_its_claim(engine: Engine) -> None:
    (event,) = queue(engine, 1, ["memory"])
    clock = Clock()
    with engine.begin() as conn:  # "a" claims, then dies before recording anything
        (claimed,) = store_deliveries.claim(conn, holder="a", now_us=clock.now, claim_us=60 * S)
    assert claimed.event_id == event
    sink = Memory()
    b = sender(engine, sink, clock, holder="b", claim_s=60)
    assert b.run_once() == 0  # a's claim still stands
    clock.now += 60 * S
    assert b.run_once() == 1
    assert sink.calls == [event] and states(engine) == [("delivered", 2)]
    with engine.begin() as conn:  # a late word from "a" changes nothing
        assert not store_deliveries.mark_delivered(
            conn, delivery_id=claimed.id, holder="a", now_us=clock.now
        )


def test_a_claim_too_short_for_an_attempt_is_given_back(engine: Engine) -> None:
    queue(engine, 2, ["memory"])
    sink = Memory()
    s = sender(engine, sink, Clock(), claim_s=5, timeout_s=10)
    assert s.run_once() == 0 and sink.calls == []
    assert states(engine) == [("pending", 0), ("pending", 0)]


def test_two_senders_deliver_each_event_once(engine: Engine) -> None:
    events = queue(engine, 40, ["memory"])
    sink = Memory(pause_s=0.005)
    senders = [
        Sender(
            engine,
            Sinks({"memory": sink}, Routing(("memory",))),  # type: ignore[dict-item]
            holder,
            RetryPolicy(),
            batch=3,
        )
        for holder in ("server-a", "server-b")
    ]
    done = Counter[str]()

    def work(s: Sender) -> None:
        while True:
            n = s.run_once()
            done[s.holder] += n
            if n == 0:
                with engine.connect() as conn:
                    if not store_deliveries.any_due(conn, now_us=2**62):
                        return

    threads = [threading.Thread(target=work, args=(s,)) for s in senders]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert Counter(sink.calls) == dict.fromkeys(events, 1)
    assert all(state == "delivered" for state, _ in states(engine))
    assert sum(done.values()) == 40
