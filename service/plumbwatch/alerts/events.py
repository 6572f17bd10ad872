"""Recording an alert's transition: the event row, its notification body, its deliveries.

Everything is written in the caller's transaction, so an event and its outbox rows
are committed together with the evaluation (or the human action) that caused them,
or not at all.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

from plumbwatch.alerts import payload
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import deliveries as store_deliveries
from plumbwatch.store.alerts import Alert


def record_event(
    conn: sa.Connection,
    *,
    alert: Alert,
    kind: str,
    from_state: str | None,
    at_us: int,
    send: bool,
    evaluation: dict[str, Any] | None = None,
    actor: str | None = None,
    rule: dict[str, Any] | None = None,
) -> str:
    """Store one event of ``alert`` (as it is after the change); with ``send``, queue
    one delivery per sink of the alert. Returns the event id."""
    event_id = store_alerts.new_event_id()
    body = payload.build(
        kind=kind,
        event_id=event_id,
        at_us=at_us,
        alert=alert.as_dict(),
        rule=rule,
        evaluation=evaluation,
        actor=actor,
    )
    row_id = store_alerts.add_event(
        conn,
        alert_id=alert.id,
        event_id=event_id,
        kind=kind,
        from_state=from_state,
        to_state=alert.state,
        evaluation_id=evaluation["id"] if evaluation else None,
        actor=actor,
        at_us=at_us,
        payload=body,
    )
    if send:
        store_deliveries.enqueue(conn, alert_event_id=row_id, sinks=alert.sinks, now_us=at_us)
    return event_id
