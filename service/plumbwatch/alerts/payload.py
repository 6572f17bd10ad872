"""The notification body: one JSON document per alert event, the same for every sink.

Shape (the Standard Webhooks recommendation of ``type``, ``timestamp``, ``data``)::

    {"type": "alert.raised",            alert.raised | .acknowledged | .shelved |
                                        .reactivated | .cleared
     "timestamp": "2026-11-30T08:15:00Z",   when the event happened
     "data": {"event_id": "evt_...",     the same as the webhook-id header
              "id": 17, "model": "late-delivery", "rule": "calibration",
              "slice": "region:north-coast", "version": "v3", "window": "P7D",
              "state": "active", "severity": "critical",
              "raised_at": T, "since": T, "acknowledged_by": null,
              "shelved_until": null, "cleared_at": null,
              "values": {"log_evidence": 7.9, "log_threshold": 8.3, "ece_debiased": 0.06,
                         "log_oe": 0.31, "n": 1400, "events": 392, ...},
              "rule_spec": {...the rule as evaluated...} | null,
              "evaluation": {"id": 812, "as_of": T} | null,
              "actor": null | "token name",
              "link": "https://plumbwatch.example/models/late-delivery",
              "summary": "one line in plain words"}}

It is stored with the event before anything is sent, so every retry sends the same
bytes under the same id.
"""

from __future__ import annotations

from typing import Any

import orjson

from plumbwatch.timefmt import format_instant

_VERBS = {
    "raised": "raised",
    "acknowledged": "acknowledged",
    "shelved": "shelved",
    "reactivated": "active again after its shelf",
    "cleared": "cleared",
}


def summary(kind: str, alert: dict[str, Any], actor: str | None = None) -> str:
    where = alert["slice"] + (f" (version {alert['version']})" if alert.get("version") else "")
    who = f" by {actor}" if actor else ""
    return (
        f"[{alert['severity']}] {alert['model']}: rule {alert['rule']} on {where} "
        f"{_VERBS.get(kind, kind)}{who}"
    )


def build(
    *,
    kind: str,
    event_id: str,
    at_us: int,
    alert: dict[str, Any],
    rule: dict[str, Any] | None,
    evaluation: dict[str, Any] | None,
    actor: str | None,
) -> str:
    """The JSON text of one event's notification."""
    data = {
        "event_id": event_id,
        **alert,
        "rule_spec": rule,
        "evaluation": evaluation,
        "actor": actor,
        "summary": summary(kind, alert, actor),
    }
    body = {"type": f"alert.{kind}", "timestamp": format_instant(at_us), "data": data}
    return orjson.dumps(body).decode()
