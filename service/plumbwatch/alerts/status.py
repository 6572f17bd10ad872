"""The alerts part of the status JSON, as it is now rather than at evaluation time.

A stored record shows the alerts as its evaluation left them; a person may have
acknowledged one since, and a delivery may have failed since. ``GET status`` lays
the current state over the record so the JSON and the page never show stale alerts.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa

from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import deliveries as store_deliveries
from plumbwatch.store.alerts import Alert


def brief(alert: Alert) -> dict[str, Any]:
    """An alert as the model's own record shows it (no model name, no link)."""
    out = alert.as_dict()
    del out["model"], out["link"]
    return out


def overlay(conn: sa.Connection, *, model_id: int, record: dict[str, Any]) -> dict[str, Any]:
    """The record with its ``alerts`` (open ones, now) and ``deliveries`` (pending,
    failed and the latest failures of the model's events) brought up to date."""
    current = store_alerts.open_alerts(conn, model_id=model_id)
    return {
        **record,
        "alerts": [brief(a) for a in sorted(current.values(), key=lambda a: a.id)],
        "deliveries": store_deliveries.model_summary(conn, model_id=model_id),
    }
