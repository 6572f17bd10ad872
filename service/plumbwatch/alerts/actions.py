"""What a person does to an alert: acknowledge it, or shelve it until a time.

Each action is an event that records the token name that took it, and is queued
for the alert's sinks like any other event. The caller owns the transaction (on
SQLite, begin it IMMEDIATE: the alert row is read, then written).
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

from plumbwatch.alerts import lifecycle
from plumbwatch.alerts.events import record_event
from plumbwatch.store import alerts as store_alerts


def acknowledge(conn: sa.Connection, *, alert_id: int, actor: str, now_us: int) -> dict[str, Any]:
    """Acknowledge an open alert (a shelved one comes off its shelf as acknowledged).

    Acknowledging an acknowledged alert changes nothing and answers it as it is, so a
    retried request is safe. NotFound for an unknown id, Conflict once it cleared.
    """
    alert = store_alerts.get_or_raise(conn, alert_id=alert_id, for_update=True)
    change = lifecycle.acknowledge(alert.id, alert.state)
    if change is None:
        return alert.as_dict()
    return _apply(conn, alert, change, actor=actor, now_us=now_us, acknowledged_by=actor)


def shelve(
    conn: sa.Connection, *, alert_id: int, actor: str, until_us: int, now_us: int
) -> dict[str, Any]:
    """Shelve an open alert until ``until_us``: quiet until then, after which it takes
    the state its condition has. InvalidInput when ``until`` is not in the future,
    NotFound for an unknown id, Conflict once it cleared."""
    alert = store_alerts.get_or_raise(conn, alert_id=alert_id, for_update=True)
    change = lifecycle.shelve(alert.id, alert.state, until_us=until_us, now_us=now_us)
    return _apply(
        conn,
        alert,
        change,
        actor=actor,
        now_us=now_us,
        acknowledged_by=alert.acknowledged_by,  # the event records who shelved it
        shelved_until_us=until_us,
    )


def _apply(
    conn: sa.Connection,
    alert: store_alerts.Alert,
    change: lifecycle.Change,
    *,
    actor: str,
    now_us: int,
    acknowledged_by: str | None,
    shelved_until_us: int | None = None,
) -> dict[str, Any]:
    """Move the alert as ``change`` says and queue the event for its sinks."""
    after = store_alerts.set_state(
        conn,
        alert=alert,
        state=change.to_state,
        now_us=now_us,
        acknowledged_by=acknowledged_by,
        shelved_until_us=shelved_until_us,
    )
    record_event(
        conn,
        alert=after,
        kind=change.kind,
        from_state=alert.state,
        at_us=now_us,
        send=True,
        actor=actor,
    )
    return after.as_dict()
