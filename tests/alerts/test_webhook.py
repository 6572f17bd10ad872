"""Webhook delivery to a real receiver on 127.0.0.1, verified with the Standard Webhooks
reference library (``standardwebhooks`` from PyPI), not with our own code."""

from __future__ import annotations

import time
from datetime import UTC, datetime

import httpx
import orjson
import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine
from standardwebhooks.webhooks import Webhook, WebhookVerificationError

from plumbwatch.alerts import signing
from plumbwatch.alerts.sinks import SinkError, WebhookSink
from plumbwatch.store.tables import alert_events, deliveries
from tests.alerts.flow import declare, evaluate, load_drifting, new_secret, wait_until
from tests.alerts.receiver import receiving
from tests.factories import running_service
from tests.live import free_port


def test_our_signature_is_the_reference_signature() -> None:
    # The reference library's own signer on the same id, time and body.
    secret = new_secret()
    body = b'{"type": "alert.raised", "data": {"slice": "region:coast"}}'
    ours = signing.headers([secret], msg_id="evt_1", timestamp=1_700_000_000, body=body)
    at = datetime.fromtimestamp(1_700_000_000, UTC)
    theirs = Webhook(secret).sign("evt_1", at, body.decode())
    assert ours["webhook-signature"] == theirs
    assert ours["webhook-id"] == "evt_1" and ours["webhook-timestamp"] == "1700000000"


def test_every_secret_of_a_rotation_signs() -> None:
    old, new = new_secret(), new_secret()
    body = b'{"x": 1}'
    headers = signing.headers([old, new], msg_id="evt_2", timestamp=int(time.time()), body=body)
    assert len(headers["webhook-signature"].split(" ")) == 2
    for secret in (old, new):  # a receiver that knows either one accepts
        assert Webhook(secret).verify(body, headers) == {"x": 1}
    with pytest.raises(WebhookVerificationError):
        Webhook(new_secret()).verify(body, headers)
    with pytest.raises(WebhookVerificationError):
        Webhook(old).verify(b'{"x": 2}', headers)  # a changed body fails


def test_refused_first_then_accepted_once_per_event_and_verified(engine: Engine) -> None:
    secrets = [new_secret(), new_secret()]
    with (
        receiving(refuse_first=2) as rx,
        running_service(
            engine,
            webhook_url=rx.url,
            webhook_secret=" ".join(secrets),
            delivery_retry_initial="PT0.2S",
            delivery_poll_interval="PT0.1S",
        ) as svc,
    ):
        declare(svc)
        load_drifting(svc, regions=("coast", "inland"))
        record = evaluate(svc)
        assert {a["slice"] for a in record["alerts"]} == {"region:coast", "region:inland"}
        wait_until(lambda: len(rx.accepted()) == 2, what="two accepted deliveries")
        time.sleep(1.0)  # room for a duplicate to show up, were there one
        status = svc.client.get("/v1/models/late/status", headers=svc.headers("read")).json()
    with engine.connect() as conn:
        event_ids = set(conn.execute(sa.select(alert_events.c.event_id)).scalars())
        rows = conn.execute(
            sa.select(deliveries.c.sink, deliveries.c.state, deliveries.c.attempts)
        ).all()
    # Each event arrived exactly once, under its stable id.
    assert rx.accepted_ids() == dict.fromkeys(event_ids, 1)
    refused = [r for r in rx.requests if r.status == 503]
    assert len(refused) == 2
    for r in refused:  # a retry is the same event: same id, same bytes
        (same,) = [a for a in rx.accepted() if a.headers["webhook-id"] == r.headers["webhook-id"]]
        assert same.body == r.body
    for request in rx.accepted():
        for secret in secrets:
            payload = Webhook(secret).verify(request.body, request.headers)
            assert payload["type"] == "alert.raised"
            data = payload["data"]
            assert data["event_id"] == request.headers["webhook-id"]
            assert data["model"] == "late" and data["state"] == "active"
            assert data["values"]["oe_ratio"] == pytest.approx(5.0)
            assert data["window"] == "P7D" and data["rule"] == "oe-high"
            assert data["link"] == "http://127.0.0.1:8000/models/late"
            assert data["evaluation"]["as_of"] == "2026-05-25T00:00:00Z"
    webhook_rows = [r for r in rows if r.sink == "webhook"]
    assert [r.state for r in webhook_rows] == ["delivered", "delivered"]
    assert sum(r.attempts for r in webhook_rows) == 4
    assert status["deliveries"]["failed"] == 0


def test_a_sink_error_names_no_url_and_no_secret() -> None:
    secret = new_secret()
    url = f"http://127.0.0.1:{free_port()}/hook?token=abc123"
    sink = WebhookSink("oncall", url, [secret], timeout_s=2)
    with pytest.raises(SinkError) as caught:
        sink.send(event_id="evt_x", body=orjson.dumps({"data": {}}).decode())
    message = str(caught.value)
    assert "abc123" not in message and secret not in message and url not in message

    def answer(_request: httpx.Request) -> httpx.Response:
        return httpx.Response(410)

    gone = WebhookSink("oncall", url, [secret], transport=httpx.MockTransport(answer))
    with pytest.raises(SinkError, match="HTTP 410"):
        gone.send(event_id="evt_x", body="{}")
