"""The demo's webhook receiver verifies Standard Webhooks signatures.

The reference is the ``standardwebhooks`` package (the specification's own
Python library, from PyPI): what it signs we accept, what we sign it accepts,
and anything tampered with or stale is refused, over real HTTP too.
"""

from __future__ import annotations

import base64
import json
import time
from datetime import UTC, datetime

import httpx
import pytest
from demo_feed.receiver import InvalidSignature, Receiver, describe, sign, verify
from standardwebhooks.webhooks import Webhook, WebhookVerificationError

SECRET = "whsec_" + base64.b64encode(b"a demo key of twenty-four").decode()
BODY = json.dumps(
    {
        "type": "alert.raised",
        "data": {
            "model": "late-delivery",
            "rule": "calibration",
            "slice": "region:north-coast",
            "state": "active",
            "severity": "page",
            "values": {"oe_ratio": 2.13, "log_evidence": 41.2},
        },
    }
).encode()


def headers(msg_id: str, timestamp: int, signature: str) -> dict[str, str]:
    return {
        "webhook-id": msg_id,
        "webhook-timestamp": str(timestamp),
        "webhook-signature": signature,
    }


def test_what_the_reference_signs_we_accept() -> None:
    now = int(time.time())
    reference = Webhook(SECRET).sign("msg_1", datetime.fromtimestamp(now, UTC), BODY.decode())
    verify(SECRET, headers("msg_1", now, reference), BODY)
    assert sign(SECRET, "msg_1", now, BODY) == reference


def test_what_we_sign_the_reference_accepts() -> None:
    now = int(time.time())
    ours = sign(SECRET, "msg_2", now, BODY)
    assert Webhook(SECRET).verify(BODY, headers("msg_2", now, ours))["data"]["state"] == "active"
    # A rotated key: several signatures, one of them ours.
    verify(SECRET, headers("msg_2", now, f"v1,bm90IGl0 {ours}"), BODY)


@pytest.mark.parametrize(
    "tamper",
    ["body", "id", "secret", "stale", "future", "missing", "version"],
)
def test_tampered_or_stale_deliveries_are_refused(tamper: str) -> None:
    now = int(time.time())
    good = sign(SECRET, "msg_3", now, BODY)
    body, h = BODY, headers("msg_3", now, good)
    if tamper == "body":
        body = BODY.replace(b"active", b"cleared")
    elif tamper == "id":
        h["webhook-id"] = "msg_4"
    elif tamper == "secret":
        other = "whsec_" + base64.b64encode(b"someone else's key").decode()
        h["webhook-signature"] = sign(other, "msg_3", now, BODY)
    elif tamper == "stale":
        h = headers("msg_3", now - 301, sign(SECRET, "msg_3", now - 301, BODY))
    elif tamper == "future":
        h = headers("msg_3", now + 301, sign(SECRET, "msg_3", now + 301, BODY))
    elif tamper == "missing":
        del h["webhook-signature"]
    elif tamper == "version":
        h["webhook-signature"] = "v2," + good.split(",", 1)[1]
    with pytest.raises(InvalidSignature):
        verify(SECRET, h, body)
    if tamper != "version":  # the reference library ignores the version prefix
        with pytest.raises(WebhookVerificationError):
            Webhook(SECRET).verify(body, h)


def test_the_receiver_prints_verified_alerts_and_refuses_the_rest() -> None:
    said: list[str] = []
    receiver = Receiver(SECRET, say=said.append).start()
    try:
        now = int(time.time())
        signed = headers("msg_5", now, sign(SECRET, "msg_5", now, BODY))
        assert httpx.post(receiver.url, content=BODY, headers=signed, timeout=5).status_code == 204
        forged = headers("msg_6", now, "v1,Zm9yZ2Vk")
        assert httpx.post(receiver.url, content=BODY, headers=forged, timeout=5).status_code == 401
    finally:
        receiver.stop()
    assert len(receiver.accepted) == 1 and receiver.refused == 1
    assert said[0].startswith("ALERT (signature verified) alert.raised model=late-delivery")
    assert "slice=region:north-coast" in said[0] and "oe_ratio=2.13" in said[0]
    assert said[1].startswith("webhook REFUSED")


def test_a_malformed_secret_is_refused_at_start() -> None:
    with pytest.raises(ValueError, match="whsec_"):
        Receiver("whsec_not base64!")


def test_describe_copes_with_any_payload_shape() -> None:
    assert describe({"model": "m", "state": "cleared"}) == "model=m state=cleared"
    assert describe([1, 2]) == "[1, 2]"
    assert describe({"something": "else"}) == '{"something": "else"}'
