"""A small local webhook receiver: verifies each delivery and prints the alert.

Signatures follow Standard Webhooks (https://www.standardwebhooks.com/): the
secret is ``whsec_`` + base64 of the key; the sender signs
``{webhook-id}.{webhook-timestamp}.{body}`` with HMAC-SHA256 and sends
``webhook-signature: v1,<base64 digest>`` (several, space-separated, during a
key rotation). A delivery is accepted when one signature matches and the
timestamp is within five minutes of our clock (replay protection); anything
else is answered 401 and printed as refused. Standard library only.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import json
import threading
import time
from collections.abc import Callable, Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

SECRET_PREFIX = "whsec_"
TOLERANCE_S = 300


class InvalidSignature(Exception):
    """The delivery is not signed with our secret, or is too old or too new."""


def _key(secret: str) -> bytes:
    try:
        return base64.b64decode(secret.removeprefix(SECRET_PREFIX), validate=True)
    except binascii.Error as exc:
        raise ValueError("the webhook secret must be whsec_ followed by base64") from exc


def sign(secret: str, msg_id: str, timestamp: int, body: bytes) -> str:
    """The ``webhook-signature`` value for a delivery (``v1,`` + base64 HMAC-SHA256)."""
    signed = f"{msg_id}.{timestamp}.".encode() + body
    digest = hmac.new(_key(secret), signed, hashlib.sha256).digest()
    return "v1," + base64.b64encode(digest).decode()


def verify(
    secret: str,
    headers: Mapping[str, str],
    body: bytes,
    *,
    now: float | None = None,
    tolerance: int = TOLERANCE_S,
) -> None:
    """Raise InvalidSignature unless the delivery is signed with ``secret`` and fresh."""
    lower = {k.lower(): v for k, v in headers.items()}
    msg_id = lower.get("webhook-id")
    stamp = lower.get("webhook-timestamp")
    signatures = lower.get("webhook-signature")
    if not (msg_id and stamp and signatures):
        raise InvalidSignature("missing webhook-id, webhook-timestamp or webhook-signature")
    try:
        timestamp = int(stamp)
    except ValueError:
        raise InvalidSignature("webhook-timestamp is not an integer") from None
    current = time.time() if now is None else now
    if abs(current - timestamp) > tolerance:
        raise InvalidSignature(f"timestamp {timestamp} is more than {tolerance} s from now")
    expected = sign(secret, msg_id, timestamp, body).split(",", 1)[1]
    for candidate in signatures.split():
        version, _, value = candidate.partition(",")
        if version == "v1" and hmac.compare_digest(value, expected):
            return
    raise InvalidSignature("no signature matches the secret")


def describe(payload: Any) -> str:
    """One line for the terminal, whatever shape the alert payload has."""
    if not isinstance(payload, dict):
        return json.dumps(payload)[:300]
    data: dict[str, Any] = payload["data"] if isinstance(payload.get("data"), dict) else payload
    alert: dict[str, Any] = data["alert"] if isinstance(data.get("alert"), dict) else data
    parts = []
    for key in ("type", "event"):
        if isinstance(payload.get(key), str):
            parts.append(payload[key])
    for key in ("model", "rule", "slice", "version", "window", "state", "severity", "health"):
        value = alert.get(key, data.get(key))
        if value not in (None, ""):
            parts.append(f"{key}={value}")
    values = alert.get("values")
    if isinstance(values, dict) and values:
        shown = ", ".join(
            f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}"
            for k, v in list(values.items())[:6]
        )
        parts.append(f"({shown})")
    return " ".join(parts) if parts else json.dumps(payload)[:300]


class Receiver:
    """``Receiver(secret, port).start()``: serves on 127.0.0.1 in a daemon thread."""

    def __init__(self, secret: str, port: int = 0, *, say: Callable[[str], None] = print) -> None:
        _key(secret)  # refuse a malformed secret at start, not at the first alert
        self.secret = secret
        self.say = say
        self.accepted: list[Any] = []
        self.refused = 0
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(length)
                try:
                    verify(receiver.secret, dict(self.headers.items()), body)
                    payload = json.loads(body or b"null")
                except (InvalidSignature, ValueError) as exc:
                    receiver.refused += 1
                    receiver.say(f"webhook REFUSED: {exc}")
                    self.send_response(401)
                    self.end_headers()
                    return
                receiver.accepted.append(payload)
                receiver.say(f"ALERT (signature verified) {describe(payload)}")
                self.send_response(204)
                self.end_headers()

            def log_message(self, format: str, *args: Any) -> None:
                pass  # the terminal shows alerts, not access lines

        self._server = ThreadingHTTPServer(("127.0.0.1", port), Handler)
        self._thread = threading.Thread(
            target=self._server.serve_forever, name="webhook-receiver", daemon=True
        )

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self._server.server_address[1]}/"

    def start(self) -> Receiver:
        self._thread.start()
        return self

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
