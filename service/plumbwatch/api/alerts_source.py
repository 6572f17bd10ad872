"""The pages' and /metrics' view of the alert store, through one seam.

Page tests replace these functions with hand-built alerts, so the pages can be
checked without raising real alerts first.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

from plumbwatch.alerts.actions import acknowledge as _acknowledge
from plumbwatch.alerts.actions import shelve as _shelve
from plumbwatch.store.alerts import list_alerts as _list_alerts
from plumbwatch.store.deliveries import counts as _delivery_counts


def list_alerts(
    conn: sa.Connection,
    *,
    state: str | None = None,
    model_id: int | None = None,
    limit: int = 100,
    after_id: int | None = None,
) -> list[dict[str, Any]]:
    return list(_list_alerts(conn, state=state, model_id=model_id, limit=limit, after_id=after_id))


def acknowledge(conn: sa.Connection, *, alert_id: int, actor: str, now_us: int) -> dict[str, Any]:
    return dict(_acknowledge(conn, alert_id=alert_id, actor=actor, now_us=now_us))


def shelve(
    conn: sa.Connection, *, alert_id: int, actor: str, until_us: int, now_us: int
) -> dict[str, Any]:
    return dict(_shelve(conn, alert_id=alert_id, actor=actor, until_us=until_us, now_us=now_us))


def delivery_counts(conn: sa.Connection) -> dict[str, int]:
    """``{"pending", "delivered", "failed", "attempts"}`` of the outbox."""
    return dict(_delivery_counts(conn))
