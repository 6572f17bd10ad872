"""Evaluation records built by hand, in the shape of the shared record contract, for
testing the pure rules before (and independently of) the evidence layer."""

from __future__ import annotations

import math
from typing import Any

AS_OF = "2026-05-25T00:00:00Z"
EVALUATED_AT = "2026-06-01T12:00:00Z"


def entry(
    slice_name: str,
    *,
    version: str | None = None,
    n: int = 1400,
    events: int = 300,
    oe: float | None = 1.0,
    ece: float | None = 0.01,
    log_evidence: float | None = None,
    log_threshold: float | None = None,
    health: str = "ok",
    **metrics: Any,
) -> dict[str, Any]:
    return {
        "slice": slice_name,
        "version": version,
        "health": health,
        "metrics": {
            "n": n,
            "events": events,
            "oe_ratio": oe,
            "ece_debiased": ece,
            "log_evidence": log_evidence,
            "log_threshold": log_threshold,
            **metrics,
        },
        "reasons": {},
    }


def stream(
    slice_name: str, log_evidence: float, *, version: str = "v1", k: int = 3, alpha: float = 0.01
) -> dict[str, Any]:
    """An evidence entry whose threshold is ln(K/alpha) (METHODS.md 7.4)."""
    return {
        "slice": slice_name,
        "version": version,
        "log_evidence": log_evidence,
        "log_threshold": math.log(k / alpha),
        "n": 5000,
        "crossed": log_evidence >= math.log(k / alpha),
    }


def record(
    entries: list[dict[str, Any]],
    evidence: list[dict[str, Any]] | None = None,
    *,
    window: str = "P7D",
    as_of: str = AS_OF,
    evaluated_at: str = EVALUATED_AT,
) -> dict[str, Any]:
    return {
        "model": "late",
        "as_of": as_of,
        "evaluated_at": evaluated_at,
        "health": "ok",
        "windows": [
            {
                "window": window,
                "start": "2026-05-17T00:00:00Z",
                "end": "2026-05-24T00:00:00Z",
                "slices": entries,
            }
        ],
        "immature": [],
        "evidence": evidence or [],
        "recalibration": None,
        "alerts": [],
    }
