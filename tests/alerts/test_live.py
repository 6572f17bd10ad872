"""Real ``plumbwatch serve`` processes (tests/live.py): a server killed with SIGKILL
while its event is stored but not delivered, and two servers sharing PostgreSQL."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import httpx
import pytest
import sqlalchemy as sa
from standardwebhooks.webhooks import Webhook

from plumbwatch.store.engine import create_engine
from plumbwatch.store.tables import alert_events, deliveries
from tests import live
from tests.alerts.flow import RULES, new_secret, wait_until
from tests.alerts.receiver import receiving

pytestmark = [pytest.mark.slow, pytest.mark.timeout(240)]


def _env(url: str, secret: str, **extra: str) -> dict[str, str]:
    return {
        "PLUMBWATCH_WEBHOOK_URL": url,
        "PLUMBWATCH_WEBHOOK_SECRET": secret,
        "PLUMBWATCH_DELIVERY_TIMEOUT": "PT1S",
        "PLUMBWATCH_DELIVERY_CLAIM": "PT5S",
        "PLUMBWATCH_DELIVERY_RETRY_INITIAL": "PT0.2S",
        "PLUMBWATCH_DELIVERY_POLL_INTERVAL": "PT0.2S",
        **extra,
    }


def _call(method: str, url: str, token: str, body: Any) -> Any:
    r = httpx.request(
        method, url, json=body, headers={"Authorization": f"Bearer {token}"}, timeout=60
    )
    assert r.status_code in (200, 201), r.text
    return r.json()


def _drifting_model(url: str, token: str, name: str, regions: list[str]) -> None:
    body = {"kind": "binary", "label_horizon": "P1D", "segment_keys": ["region"], "rules": RULES}
    _call("PUT", f"{url}/v1/models/{name}", token, body)
    ids = [f"{r}-{i}" for r in regions for i in range(5)]
    rows = [
        {
            "id": i,
            "predicted_at": "2026-05-20T08:00:00Z",
            "probability": 0.2,
            "segments": {"region": i.rsplit("-", 1)[0]},
        }
        for i in ids
    ]
    _call("POST", f"{url}/v1/models/{name}/predictions", token, {"predictions": rows})
    outs = [{"id": i, "outcome": 1, "observed_at": "2026-05-20T20:00:00Z"} for i in ids]
    _call("POST", f"{url}/v1/models/{name}/outcomes", token, {"outcomes": outs})


def _evaluate(url: str, token: str, name: str) -> dict[str, Any]:
    body = {"as_of": "2026-05-25T00:00:00Z"}
    return dict(_call("POST", f"{url}/v1/models/{name}/evaluations", token, body))


def _stored(database_url: str) -> tuple[set[str], list[Any]]:
    engine = create_engine(database_url)
    try:
        with engine.connect() as conn:
            ids = set(conn.execute(sa.select(alert_events.c.event_id)).scalars())
            rows = list(conn.execute(sa.select(deliveries)))
    finally:
        engine.dispose()
    return ids, rows


def test_killed_between_storing_and_sending_delivers_after_restart(
    database_url: str, tmp_path: Path
) -> None:
    token = live.migrate_and_token(database_url)
    secret = new_secret()
    # The receiver holds the first request without answering: the server is mid-send.
    with receiving(hang_first=1) as rx:
        env = _env(rx.url, secret)
        server = live.start(database_url, tmp_path / "a.log", env=env)
        try:
            _drifting_model(server.url, token, "late", ["coast"])
            record = _evaluate(server.url, token, "late")
            assert [a["slice"] for a in record["alerts"]] == ["region:coast"]
            assert rx.got_one.wait(30), server.log_text()
            server.kill()  # SIGKILL: no shutdown handler runs
        finally:
            server.kill()
        event_ids, rows = _stored(database_url)
        (event_id,) = event_ids
        hook = [r for r in rows if r.sink == "webhook"]
        assert [r.state for r in hook] == ["pending"]  # stored, not delivered
        assert rx.accepted() == []
        with live.served(database_url, tmp_path / "b.log", env=env) as again:
            # The dead server's claim runs out (PT5S), then the new one sends.
            wait_until(lambda: len(rx.accepted()) >= 1, timeout=60, what="redelivery")
            time.sleep(1.0)
            log = again.log_text()
        assert rx.accepted_ids() == {event_id: 1}, log
        (request,) = rx.accepted()
        payload = Webhook(secret).verify(request.body, request.headers)
        assert payload["data"]["event_id"] == event_id
    _, rows = _stored(database_url)
    assert {r.state for r in rows} == {"delivered"}
    assert "delivered event" in log and secret not in log


def test_two_servers_send_each_event_once(database_url: str, tmp_path: Path) -> None:
    if not database_url.startswith("postgresql"):
        pytest.skip("replicas share PostgreSQL; SQLite is one server's embedded database")
    token = live.migrate_and_token(database_url)
    secret = new_secret()
    regions = [f"z{i:02d}" for i in range(25)]
    with receiving(delay_s=0.02) as rx:
        env = _env(rx.url, secret, PLUMBWATCH_DELIVERY_POLL_INTERVAL="PT0.1S")
        with (
            live.served(database_url, tmp_path / "a.log", env=env) as a,
            live.served(database_url, tmp_path / "b.log", env=env) as b,
        ):
            _drifting_model(a.url, token, "late", regions)
            _drifting_model(b.url, token, "claims", regions)
            # Each server evaluates one model; both senders then race for the outbox.
            _evaluate(b.url, token, "late")
            _evaluate(a.url, token, "claims")
            wait_until(lambda: len(rx.accepted()) >= 50, timeout=90, what="50 deliveries")
            time.sleep(2.0)  # room for a duplicate to show up, were there one
            logs = (a.log_text(), b.log_text())
    event_ids, rows = _stored(database_url)
    assert len(event_ids) == 50
    assert rx.accepted_ids() == dict.fromkeys(event_ids, 1)
    assert {r.state for r in rows} == {"delivered"} and len(rows) == 100  # webhook + log
    for request in rx.accepted():
        Webhook(secret).verify(request.body, request.headers)
    per_server = [log.count("delivered event") for log in logs]
    print(f"deliveries recorded per server: {per_server}")
    assert sum(per_server) == 100
