"""The pages' and /metrics' view of the alert store, through one seam.

Page tests replace these names with hand-built alerts, so the pages can be checked
without raising real alerts first; callers look them up here at call time.
"""

from __future__ import annotations

from plumbwatch.alerts.actions import acknowledge, shelve
from plumbwatch.store.alerts import list_alerts
from plumbwatch.store.deliveries import counts as delivery_counts

__all__ = ["acknowledge", "delivery_counts", "list_alerts", "shelve"]
