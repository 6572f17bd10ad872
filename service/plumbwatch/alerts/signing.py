"""Standard Webhooks signatures (https://www.standardwebhooks.com/, the open spec).

The signed content is ``<webhook-id>.<webhook-timestamp>.<body>``; each secret
(``whsec_`` + base64 of the HMAC key) gives one ``v1,<base64 HMAC-SHA256>``, and
``webhook-signature`` lists them separated by spaces, so a receiver that knows any
one of the secrets accepts the message while the secrets rotate.
"""

from __future__ import annotations

import base64
import hashlib
import hmac

from plumbwatch.config import decode_webhook_secret


def signature(key: bytes, *, msg_id: str, timestamp: int, body: bytes) -> str:
    signed = msg_id.encode() + b"." + str(timestamp).encode() + b"." + body
    digest = hmac.new(key, signed, hashlib.sha256).digest()
    return "v1," + base64.b64encode(digest).decode()


def headers(secrets: list[str], *, msg_id: str, timestamp: int, body: bytes) -> dict[str, str]:
    """The three Standard Webhooks headers for one delivery attempt."""
    keys = [decode_webhook_secret(s) for s in secrets]
    return {
        "webhook-id": msg_id,
        "webhook-timestamp": str(timestamp),
        "webhook-signature": " ".join(
            signature(k, msg_id=msg_id, timestamp=timestamp, body=body) for k in keys
        ),
    }
