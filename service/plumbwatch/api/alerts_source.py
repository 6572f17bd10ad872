"""The pages' and /metrics' view of the alert store, through one seam.

The alert store and its actions come with the alerts work; until they are in
this build, the imports fail and the pages show "no alerts" (and /metrics no
delivery counters). Tests replace these functions with hand-built alerts.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

try:
    from plumbwatch.alerts.actions import acknowledge as _acknowledge
    from plumbwatch.alerts.actions import shelve as _shelve
    from plumbwatch.store.alerts import list_alerts as _list_alerts
    from plumbwatch.store.deliveries import counts as _delivery_counts

    AVAILABLE = True
except ImportError:  # the alerts work is not in this build
    AVAILABLE = False


def list_alerts(
    conn: sa.Connection,
    *,
    state: str | None = None,
    model_id: int | None = None,
    limit: int = 100,
    after_id: int | None = None,
) -> list[dict[str, Any]]:
    if not AVAILABLE:
        return []
    return list(_list_alerts(conn, state=state, model_id=model_id, limit=limit, after_id=after_id))


def acknowledge(conn: sa.Connection, *, alert_id: int, actor: str, now_us: int) -> dict[str, Any]:
    if not AVAILABLE:
        raise NotImplementedError("alert actions are not part of this build")
    return dict(_acknowledge(conn, alert_id=alert_id, actor=actor, now_us=now_us))


def shelve(
    conn: sa.Connection, *, alert_id: int, actor: str, until_us: int, now_us: int
) -> dict[str, Any]:
    if not AVAILABLE:
        raise NotImplementedError("alert actions are not part of this build")
    return dict(_shelve(conn, alert_id=alert_id, actor=actor, until_us=until_us, now_us=now_us))


def delivery_counts(conn: sa.Connection) -> dict[str, int] | None:
    """``{"pending", "delivered", "failed", "attempts"}``, or None without the outbox."""
    if not AVAILABLE:
        return None
    return dict(_delivery_counts(conn))
