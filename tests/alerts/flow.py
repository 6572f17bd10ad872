"""Real alerts through the real path: declare a model with a rule, post rows whose
outcomes contradict their probabilities, evaluate over HTTP."""

from __future__ import annotations

import base64
import os
import time
from collections.abc import Callable
from typing import Any

from tests.factories import Service, outcome, prediction

# O/E above 1.5 on region slices: rows with p = 0.2 whose outcomes are all 1 give O/E = 5.
RULES: list[dict[str, Any]] = [
    {
        "name": "oe-high",
        "condition": "metric",
        "metric": "oe_ratio",
        "above": 1.5,
        "slices": ["region:*"],
        "min_events": 0,
        "raise_after": 1,
        "clear_after": 1,
    }
]


def new_secret() -> str:
    return "whsec_" + base64.b64encode(os.urandom(32)).decode()


def declare(svc: Service, name: str = "late", rules: list[dict[str, Any]] = RULES) -> None:
    body = {"kind": "binary", "label_horizon": "P1D", "segment_keys": ["region"], "rules": rules}
    svc.put_model(name, body)


def load_drifting(
    svc: Service, name: str = "late", regions: tuple[str, ...] = ("coast",), n: int = 10
) -> None:
    ids = [f"{r}-{i}" for r in regions for i in range(n)]
    rows = [
        prediction(
            i,
            predicted_at="2026-05-20T08:00:00Z",
            probability=0.2,
            segments={"region": i.split("-")[0]},
        )
        for i in ids
    ]
    r = svc.post(f"/v1/models/{name}/predictions", {"predictions": rows})
    assert r.status_code == 200, r.text
    outs = [outcome(i, outcome=1, observed_at="2026-05-20T20:00:00Z") for i in ids]
    r = svc.post(f"/v1/models/{name}/outcomes", {"outcomes": outs})
    assert r.status_code == 200, r.text


def evaluate(
    svc: Service, name: str = "late", as_of: str = "2026-05-25T00:00:00Z", notify: bool = True
) -> dict[str, Any]:
    r = svc.post(f"/v1/models/{name}/evaluations", {"as_of": as_of, "notify": notify})
    assert r.status_code == 200, r.text
    return dict(r.json())


def wait_until(check: Callable[[], bool], *, timeout: float = 30.0, what: str = "") -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what or check}")
        time.sleep(0.05)


def settle(svc: Service, timeout: float = 30.0) -> None:
    """Wait until the service's sender has nothing due: on SQLite a test's own
    read-then-write transaction would otherwise race the sender's writes."""
    from plumbwatch.store import deliveries as store_deliveries

    def idle() -> bool:
        with svc.engine.connect() as conn:
            return store_deliveries.counts(conn)["pending"] == 0

    wait_until(idle, timeout=timeout, what="no pending deliveries")
