"""The evaluation hook on a real database (both engines): the lifecycle stored as alerts
and events tied to evaluations, human actions with the token name, the outbox rows,
shelf expiry, and replays that must not move anything."""

from __future__ import annotations

from typing import Any

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.alerts import actions
from plumbwatch.alerts.process import Context, expire_shelves, process_record
from plumbwatch.alerts.rules import Defaults
from plumbwatch.alerts.sinks import Routing
from plumbwatch.declarations import ModelDeclaration
from plumbwatch.errors import Conflict, InvalidInput, NotFound
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import BEGIN_OPTION
from plumbwatch.store.tables import alert_events, alerts, deliveries
from plumbwatch.timefmt import format_instant
from tests.alerts.records import entry, record

DAY_US = 86_400_000_000
T0 = 20_600 * DAY_US  # 2026-05-27
HIGH_OE = [
    {
        "name": "oe-high",
        "condition": "metric",
        "metric": "oe_ratio",
        "above": 1.5,
        "min_events": 0,
        "raise_after": 2,
        "clear_after": 2,
        "severity": "critical",
    }
]
CTX = Context(Defaults(), Routing(("log", "webhook")), "http://127.0.0.1:8000")


class Run:
    """Evaluations of one model fed hand-built records, each through the real hook."""

    def __init__(self, engine: Engine, rules: list[dict[str, Any]] = HIGH_OE) -> None:
        self.engine = engine
        self.day = 0
        decl = ModelDeclaration.model_validate(
            {"kind": "binary", "label_horizon": "P1D", "segment_keys": ["region"], "rules": rules}
        )
        with engine.begin() as conn:
            self.model, _ = store_models.upsert(conn=conn, name="late", declaration=decl, now_us=0)

    def write(self) -> sa.Connection:
        return self.engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})

    def evaluate(
        self, drifting: set[str], *, notify: bool = True, day: int | None = None
    ) -> tuple[int, dict[str, Any]]:
        if day is None:
            self.day += 1
            day = self.day
        at = T0 + day * DAY_US
        rec = record(
            [
                entry(name, oe=2.0 if name in drifting else 1.0)
                for name in ("overall", "region:coast", "region:inland")
            ],
            as_of=format_instant(at),
            evaluated_at=format_instant(at + 3600 * 10**6),
        )
        with self.write() as conn, conn.begin():
            eid = store_evaluations.create(
                conn,
                model_id=self.model.id,
                as_of_us=at,
                evaluated_at_us=at,
                health="ok",
                record=rec,
            )
            process_record(conn, self.model, eid, rec, notify, ctx=CTX)
        return eid, rec

    def rows(self, table: sa.Table) -> list[Any]:
        with self.engine.connect() as conn:
            return list(conn.execute(sa.select(table).order_by(table.c.id)))


@pytest.fixture
def run(engine: Engine) -> Run:
    return Run(engine)


def test_raise_after_two_events_tied_to_evaluations_and_queued_per_sink(run: Run) -> None:
    _, rec = run.evaluate({"region:coast"})
    assert rec["alerts"] == [] and run.rows(alerts) == []
    assert rec["health"] == "drifting"  # the condition holds already; the page waits
    second, rec = run.evaluate({"region:coast"})
    (alert,) = run.rows(alerts)
    assert (alert.rule, alert.slice, alert.state, alert.severity) == (
        "oe-high",
        "region:coast",
        "active",
        "critical",
    )
    assert [a["id"] for a in rec["alerts"]] == [alert.id]
    assert rec["alerts"][0]["values"]["oe_ratio"] == 2.0
    (event,) = run.rows(alert_events)
    assert (event.kind, event.to_state, event.evaluation_id) == ("raised", "active", second)
    assert {d.sink for d in run.rows(deliveries)} == {"log", "webhook"}
    assert rec["deliveries"]["pending"] == 2


def test_no_second_alert_while_one_is_open_and_re_raise_after_clear(run: Run) -> None:
    for _ in range(5):
        run.evaluate({"region:coast"})
    assert len(run.rows(alerts)) == 1
    run.evaluate(set())
    run.evaluate(set())  # clear_after = 2
    (cleared,) = run.rows(alerts)
    assert cleared.state == "cleared" and cleared.open_key is None
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    old, new = run.rows(alerts)
    assert (old.state, new.state) == ("cleared", "active")
    kinds = [e.kind for e in run.rows(alert_events)]
    assert kinds == ["raised", "cleared", "raised"]


def test_the_database_refuses_two_open_alerts_for_one_slice(run: Run) -> None:
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    with run.write() as conn, conn.begin(), pytest.raises(sa.exc.IntegrityError):
        store_alerts.create(
            conn,
            model_id=run.model.id,
            rule="oe-high",
            slice_name="region:coast",
            version=None,
            window="P7D",
            severity="critical",
            values={},
            sinks=[],
            link="x",
            now_us=0,
        )


def test_notify_false_records_the_lifecycle_and_sends_nothing(run: Run) -> None:
    run.evaluate({"region:coast"}, notify=False)
    run.evaluate({"region:coast"}, notify=False)
    assert [a.state for a in run.rows(alerts)] == ["active"]
    assert [e.kind for e in run.rows(alert_events)] == ["raised"]
    assert run.rows(deliveries) == []


def test_a_replay_into_the_past_moves_nothing(run: Run) -> None:
    run.evaluate(set(), day=10)
    run.evaluate({"region:coast"}, day=3)
    _, rec = run.evaluate({"region:coast"}, day=4)
    assert run.rows(alerts) == []
    # ...but its health still says what the rules see in it.
    assert rec["health"] == "drifting"
    _, rec = run.evaluate({"region:coast"}, day=10)  # a repeat of the latest as_of
    assert run.rows(alerts) == []


def test_acknowledge_and_shelve_record_the_token_name(run: Run) -> None:
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    (alert,) = run.rows(alerts)
    now = T0 + 3 * DAY_US
    with run.write() as conn, conn.begin():
        acked = actions.acknowledge(conn, alert_id=alert.id, actor="oncall-ana", now_us=now)
        again = actions.acknowledge(conn, alert_id=alert.id, actor="oncall-ben", now_us=now)
    assert acked["state"] == "acknowledged" and acked["acknowledged_by"] == "oncall-ana"
    assert again == acked  # a retry changes nothing
    with run.write() as conn, conn.begin():
        shelved = actions.shelve(
            conn, alert_id=alert.id, actor="oncall-ben", until_us=now + DAY_US, now_us=now
        )
    assert shelved["state"] == "shelved"
    assert shelved["shelved_until"] == format_instant(now + DAY_US)
    events = run.rows(alert_events)
    assert [(e.kind, e.actor, e.evaluation_id is None) for e in events] == [
        ("raised", None, False),
        ("acknowledged", "oncall-ana", True),
        ("shelved", "oncall-ben", True),
    ]
    # every event goes to the alert's sinks
    assert len(run.rows(deliveries)) == 3 * 2
    with run.write() as conn, conn.begin():
        with pytest.raises(NotFound):
            actions.acknowledge(conn, alert_id=999_999, actor="x", now_us=now)
        with pytest.raises(InvalidInput):
            actions.shelve(conn, alert_id=alert.id, actor="x", until_us=now, now_us=now)


def test_shelf_expires_in_an_evaluation_to_the_state_of_its_condition(run: Run) -> None:
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    (alert,) = run.rows(alerts)
    with run.write() as conn, conn.begin():
        # until the day-4 evaluation (its clock is 10 hours past its as_of)
        actions.shelve(conn, alert_id=alert.id, actor="ana", until_us=T0 + 4 * DAY_US, now_us=T0)
    run.evaluate({"region:coast"})  # day 3: still on the shelf, quiet
    assert run.rows(alerts)[0].state == "shelved"
    run.evaluate({"region:coast"})  # day 4: expired, condition holds
    (alert,) = run.rows(alerts)
    assert alert.state == "active" and alert.shelved_until_us is None
    assert [e.kind for e in run.rows(alert_events)][-1] == "reactivated"


def test_shelf_expiry_outside_evaluations_uses_the_last_verdict(run: Run) -> None:
    run.evaluate({"region:coast", "region:inland"})
    run.evaluate({"region:coast", "region:inland"})
    run.evaluate({"region:coast"})  # inland calm once (clear_after 2): still open
    coast, inland = run.rows(alerts)
    with run.write() as conn, conn.begin():
        for a in (coast, inland):
            actions.shelve(conn, alert_id=a.id, actor="ana", until_us=T0 + 50, now_us=T0)
    with run.write() as conn, conn.begin():
        assert expire_shelves(conn, now_us=T0 + 49) == 0
        assert expire_shelves(conn, now_us=T0 + 50) == 2
    coast, inland = run.rows(alerts)
    assert (coast.state, inland.state) == ("active", "cleared")
    last = run.rows(alert_events)[-2:]
    assert [e.kind for e in last] == ["reactivated", "cleared"]
    # tied to the evaluation whose verdict decided it
    assert last[0].evaluation_id is not None


def test_cleared_alert_cannot_be_acknowledged(run: Run) -> None:
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    run.evaluate(set())
    run.evaluate(set())
    (alert,) = run.rows(alerts)
    with run.write() as conn, conn.begin(), pytest.raises(Conflict):
        actions.acknowledge(conn, alert_id=alert.id, actor="x", now_us=T0)


def test_removing_the_rule_clears_its_alerts(engine: Engine) -> None:
    run = Run(engine)
    run.evaluate({"region:coast"})
    run.evaluate({"region:coast"})
    decl = run.model.declaration.model_copy(update={"rules": []})
    with engine.begin() as conn:
        run.model, _ = store_models.upsert(conn=conn, name="late", declaration=decl, now_us=0)
    _, rec = run.evaluate({"region:coast"})
    (alert,) = run.rows(alerts)
    assert alert.state == "cleared"
    assert [a["state"] for a in rec["alerts"]] == ["cleared"]  # shown once, as cleared


def test_list_alerts_filters_and_pages(run: Run) -> None:
    run.evaluate({"region:coast", "region:inland", "overall"})
    run.evaluate({"region:coast", "region:inland", "overall"})
    with run.write() as conn, conn.begin():
        first = store_alerts.list_alerts(conn)
        actions.acknowledge(conn, alert_id=first[0]["id"], actor="ana", now_us=T0)
    with run.engine.connect() as conn:
        page1 = store_alerts.list_alerts(conn, limit=2)
        page2 = store_alerts.list_alerts(conn, limit=2, after_id=page1[-1]["id"])
        acked = store_alerts.list_alerts(conn, state="acknowledged")
        open_ = store_alerts.list_alerts(conn, state="open", model_id=run.model.id)
        none = store_alerts.list_alerts(conn, state="cleared")
    ids = [a["id"] for a in page1 + page2]
    assert ids == sorted(ids, reverse=True) and len(set(ids)) == 3
    assert [a["id"] for a in acked] == [first[0]["id"]]
    assert len(open_) == 3 and none == []
    assert set(first[0]) >= {
        "id",
        "model",
        "rule",
        "slice",
        "version",
        "window",
        "state",
        "severity",
        "raised_at",
        "since",
        "acknowledged_by",
        "shelved_until",
        "cleared_at",
        "values",
    }
    assert first[0]["model"] == "late"
