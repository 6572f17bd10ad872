"""The delivery outbox: one row per (event, sink), stored before anything is sent.

A sender claims due rows for a while (``claimed_by``, ``claimed_until_us``) in a
short transaction, sends outside it, then records the outcome only if it still
holds the claim. On PostgreSQL the claim skips rows another server is claiming
(``FOR UPDATE SKIP LOCKED``); on SQLite the writer lock serialises claims. So two
servers never send the same delivery at once, and a sender that dies mid-send
leaves a claim that simply expires: the row is sent again (at least once).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from plumbwatch.store.tables import alert_events, alerts, deliveries
from plumbwatch.timefmt import format_instant

d = deliveries


@dataclass(frozen=True)
class Delivery:
    id: int
    sink: str
    attempts: int  # including the one now claimed
    first_attempt_us: int
    event_id: str  # the stable id receivers deduplicate on
    payload: str  # the stored notification body (JSON text)


def enqueue(conn: sa.Connection, *, alert_event_id: int, sinks: list[str], now_us: int) -> int:
    """Store one pending delivery per sink, due at once; returns how many."""
    rows = [
        {
            "alert_event_id": alert_event_id,
            "sink": sink,
            "state": "pending",
            "attempts": 0,
            "next_attempt_us": 0,  # due now, whatever the sender's clock says
            "created_at_us": now_us,
        }
        for sink in dict.fromkeys(sinks)
    ]
    if rows:
        conn.execute(sa.insert(d), rows)
    return len(rows)


def _due(now_us: int) -> sa.ColumnElement[bool]:
    return sa.and_(
        d.c.state == "pending",
        d.c.next_attempt_us <= now_us,
        sa.or_(d.c.claimed_until_us.is_(None), d.c.claimed_until_us <= now_us),
    )


def any_due(conn: sa.Connection, *, now_us: int) -> bool:
    """A cheap read, so an idle sender takes no write lock."""
    return conn.execute(sa.select(sa.literal(1)).where(_due(now_us)).limit(1)).first() is not None


def claim(
    conn: sa.Connection, *, holder: str, now_us: int, claim_us: int, limit: int = 10
) -> list[Delivery]:
    """Claim up to ``limit`` due deliveries for ``holder`` and count the attempt."""
    ids = list(
        conn.execute(
            sa.select(d.c.id)
            .where(_due(now_us))
            .order_by(d.c.id)
            .limit(limit)
            .with_for_update(skip_locked=True)
        ).scalars()
    )
    if not ids:
        return []
    until = now_us + claim_us
    conn.execute(
        sa.update(d)
        .where(d.c.id.in_(ids), _due(now_us))  # the guard repeats the test under the lock
        .values(
            claimed_by=holder,
            claimed_until_us=until,
            attempts=d.c.attempts + 1,
            first_attempt_us=sa.func.coalesce(d.c.first_attempt_us, now_us),
            last_attempt_us=now_us,
        )
    )
    rows = conn.execute(
        sa.select(
            d.c.id,
            d.c.sink,
            d.c.attempts,
            d.c.first_attempt_us,
            alert_events.c.event_id,
            alert_events.c.payload,
        )
        .join(alert_events, alert_events.c.id == d.c.alert_event_id)
        .where(d.c.id.in_(ids), d.c.claimed_by == holder, d.c.claimed_until_us == until)
        .order_by(d.c.id)
    )
    return [Delivery(*row) for row in rows]


def _mine(delivery_id: int, holder: str) -> sa.ColumnElement[bool]:
    return sa.and_(d.c.id == delivery_id, d.c.claimed_by == holder, d.c.state == "pending")


def mark_delivered(conn: sa.Connection, *, delivery_id: int, holder: str, now_us: int) -> bool:
    """Record success; False if the claim was lost meanwhile (nothing changes)."""
    done = conn.execute(
        sa.update(d)
        .where(_mine(delivery_id, holder))
        .values(
            state="delivered",
            finished_at_us=now_us,
            last_error=None,
            claimed_by=None,
            claimed_until_us=None,
        )
    )
    return bool(done.rowcount)


def mark_retry(
    conn: sa.Connection,
    *,
    delivery_id: int,
    holder: str,
    next_attempt_us: int,
    error: str,
) -> bool:
    done = conn.execute(
        sa.update(d)
        .where(_mine(delivery_id, holder))
        .values(
            next_attempt_us=next_attempt_us,
            last_error=error[:1000],
            claimed_by=None,
            claimed_until_us=None,
        )
    )
    return bool(done.rowcount)


def mark_failed(
    conn: sa.Connection, *, delivery_id: int, holder: str, now_us: int, error: str
) -> bool:
    done = conn.execute(
        sa.update(d)
        .where(_mine(delivery_id, holder))
        .values(
            state="failed",
            finished_at_us=now_us,
            last_error=error[:1000],
            claimed_by=None,
            claimed_until_us=None,
        )
    )
    return bool(done.rowcount)


def release(conn: sa.Connection, *, delivery_ids: list[int], holder: str) -> None:
    """Give back claimed rows not attempted after all (their attempt is not counted)."""
    if delivery_ids:
        conn.execute(
            sa.update(d)
            .where(d.c.id.in_(delivery_ids), d.c.claimed_by == holder, d.c.state == "pending")
            .values(claimed_by=None, claimed_until_us=None, attempts=d.c.attempts - 1)
        )


def counts(conn: sa.Connection) -> dict[str, int]:
    """Deliveries by state, and attempts made, over all models (for OpenMetrics)."""
    out = {"pending": 0, "delivered": 0, "failed": 0, "attempts": 0}
    rows = conn.execute(
        sa.select(
            d.c.state, sa.func.count(), sa.func.coalesce(sa.func.sum(d.c.attempts), 0)
        ).group_by(d.c.state)
    )
    for state, n, attempts in rows:
        out[state] = int(n)
        out["attempts"] += int(attempts)
    return out


def model_summary(conn: sa.Connection, *, model_id: int, recent: int = 10) -> dict[str, Any]:
    """Pending and failed deliveries of one model's alerts, with the latest failures
    (the status JSON and page show them: a page that was never delivered must be seen)."""
    of_model = alerts.c.model_id == model_id
    by_state: dict[str, int] = dict(
        conn.execute(
            sa.select(d.c.state, sa.func.count())
            .select_from(d)
            .join(alert_events, d.c.alert_event_id == alert_events.c.id)
            .join(alerts, alert_events.c.alert_id == alerts.c.id)
            .where(of_model)
            .group_by(d.c.state)
        ).all()
    )
    failures = conn.execute(
        sa.select(
            alert_events.c.event_id,
            alert_events.c.kind,
            alerts.c.id.label("alert_id"),
            d.c.sink,
            d.c.attempts,
            d.c.last_error,
            d.c.finished_at_us,
        )
        .select_from(d)
        .join(alert_events, d.c.alert_event_id == alert_events.c.id)
        .join(alerts, alert_events.c.alert_id == alerts.c.id)
        .where(of_model, d.c.state == "failed")
        .order_by(d.c.id.desc())
        .limit(recent)
    )
    return {
        "pending": int(by_state.get("pending", 0)),
        "delivered": int(by_state.get("delivered", 0)),
        "failed": int(by_state.get("failed", 0)),
        "failures": [
            {
                "event_id": r.event_id,
                "event": r.kind,
                "alert_id": r.alert_id,
                "sink": r.sink,
                "attempts": r.attempts,
                "error": r.last_error,
                "failed_at": format_instant(r.finished_at_us),
            }
            for r in failures
        ],
    }


def list_for_event(conn: sa.Connection, *, event_id: str) -> list[dict[str, Any]]:
    rows = conn.execute(
        sa.select(d.c.sink, d.c.state, d.c.attempts, d.c.last_error)
        .join(alert_events, alert_events.c.id == d.c.alert_event_id)
        .where(alert_events.c.event_id == event_id)
        .order_by(d.c.id)
    )
    return [dict(r._mapping) for r in rows]
