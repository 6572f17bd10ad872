"""Email through a real local SMTP server (aiosmtpd from PyPI): plain, and with STARTTLS
and login against a throwaway certificate authority (trustme from PyPI)."""

from __future__ import annotations

import email
import ssl
from collections.abc import Iterator
from email.message import Message
from pathlib import Path
from typing import Any

import orjson
import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from sqlalchemy.engine import Engine

from plumbwatch.alerts.sinks import EmailSink, SinkError
from tests.alerts.flow import declare, evaluate, load_drifting, wait_until
from tests.factories import running_service
from tests.live import free_port

BODY = orjson.dumps(
    {
        "type": "alert.raised",
        "timestamp": "2026-05-25T10:00:00Z",
        "data": {
            "summary": "[critical] late: rule calibration on region:coast raised",
            "state": "active",
            "since": "2026-05-25T10:00:00Z",
            "model": "late",
            "version": "v3",
            "slice": "region:coast",
            "window": "P7D",
            "values": {"log_evidence": 9.1, "log_oe": 0.31},
            "link": "http://127.0.0.1:8000/models/late",
        },
    }
).decode()


class Inbox:
    def __init__(self) -> None:
        self.messages: list[Message] = []
        self.recipients: list[list[str]] = []

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        self.messages.append(email.message_from_bytes(envelope.original_content))
        self.recipients.append(list(envelope.rcpt_tos))
        return "250 OK"


@pytest.fixture
def inbox() -> Iterator[tuple[Inbox, int]]:
    box = Inbox()
    port = free_port()
    controller = Controller(box, hostname="127.0.0.1", port=port)
    controller.start()
    try:
        yield box, port
    finally:
        controller.stop()


def test_plain_smtp_gets_the_email(inbox: tuple[Inbox, int]) -> None:
    box, port = inbox
    sink = EmailSink(
        "email", "127.0.0.1", port, ["oncall@courier.example"], "pw@courier.example", starttls=False
    )
    sink.send(event_id="evt_abc", body=BODY)
    (message,) = box.messages
    assert box.recipients == [["oncall@courier.example"]]
    subject = "[plumbwatch] [critical] late: rule calibration on region:coast raised"
    assert message["Subject"] == subject
    assert message["Message-ID"] == "<evt_abc@plumbwatch>"
    text = message.get_payload()
    assert "http://127.0.0.1:8000/models/late" in text and "log_evidence: 9.1" in text


def _authenticator(
    server: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any
) -> AuthResult:
    ok = isinstance(auth_data, LoginPassword) and (auth_data.login, auth_data.password) == (
        b"plumbwatch",
        b"s3cret-pass",
    )
    return AuthResult(success=ok)


def test_starttls_and_login(tmp_path: Path) -> None:
    import trustme

    ca = trustme.CA()
    server_context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("127.0.0.1").configure_cert(server_context)
    ca_file = tmp_path / "ca.pem"
    ca.cert_pem.write_to_path(str(ca_file))
    box, port = Inbox(), free_port()
    controller = Controller(
        box,
        hostname="127.0.0.1",
        port=port,
        tls_context=server_context,
        require_starttls=True,
        authenticator=_authenticator,
        auth_require_tls=True,
    )
    controller.start()
    try:
        sink = EmailSink(
            "email",
            "127.0.0.1",
            port,
            ["oncall@courier.example"],
            "pw@courier.example",
            starttls=True,
            username="plumbwatch",
            password="s3cret-pass",
            ca_file=str(ca_file),
        )
        sink.send(event_id="evt_tls", body=BODY)
        assert len(box.messages) == 1
        wrong = EmailSink(
            "email",
            "127.0.0.1",
            port,
            ["oncall@courier.example"],
            "pw@courier.example",
            starttls=True,
            username="plumbwatch",
            password="not-the-pass",
            ca_file=str(ca_file),
            timeout_s=2,  # this server answers a failed login by going quiet
        )
        with pytest.raises(SinkError) as caught:
            wrong.send(event_id="evt_bad", body=BODY)
        assert "not-the-pass" not in str(caught.value)
        # Without the private CA the server's certificate is not trusted: refused.
        untrusted = EmailSink(
            "email", "127.0.0.1", port, ["x@courier.example"], "pw@courier.example", starttls=True
        )
        with pytest.raises(SinkError, match=r"SSL|certificate"):
            untrusted.send(event_id="evt_ca", body=BODY)
    finally:
        controller.stop()
    assert len(box.messages) == 1


def test_an_alert_reaches_the_inbox_through_the_service(
    engine: Engine, inbox: tuple[Inbox, int]
) -> None:
    box, port = inbox
    with running_service(
        engine,
        smtp_host="127.0.0.1",
        smtp_port=port,
        smtp_starttls=False,
        email_to="oncall@courier.example, data@courier.example",
        delivery_poll_interval="PT0.1S",
    ) as svc:
        declare(svc)
        load_drifting(svc)
        evaluate(svc)
        wait_until(lambda: len(box.messages) == 1, what="one email")
    (message,) = box.messages
    assert box.recipients == [["oncall@courier.example", "data@courier.example"]]
    assert "region:coast" in message["Subject"] and "oe-high" in message["Subject"]
