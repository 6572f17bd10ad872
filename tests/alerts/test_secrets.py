"""Secrets (webhook secrets, the SMTP password) never reach a log line, an answer, the
status JSON or the database, even when every delivery fails."""

from __future__ import annotations

import base64
import logging
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.alerts.sinks import build_sinks, secrets_of
from plumbwatch.config import Settings, load_settings
from plumbwatch.errors import ConfigError
from plumbwatch.store.tables import alert_events, alerts, deliveries
from tests.alerts.flow import declare, evaluate, load_drifting, new_secret, wait_until
from tests.factories import running_service
from tests.live import free_port


def _forms(secret: str) -> list[str]:
    """The secret as given, and its key material in the forms a leak could take."""
    out = [secret]
    if secret.startswith("whsec_"):
        body = secret.removeprefix("whsec_")
        out += [body, base64.b64decode(body).hex()]
    return out


def test_failing_deliveries_leak_no_secret(
    engine: Engine, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.DEBUG)
    hook_secrets = [new_secret(), new_secret()]
    password = "pw-" + new_secret()[6:20]
    closed = free_port()  # nobody listens: every attempt is refused
    with running_service(
        engine,
        webhook_url=f"http://127.0.0.1:{closed}/hook?key=url-token-123",
        webhook_secret=" ".join(hook_secrets),
        smtp_host="127.0.0.1",
        smtp_port=free_port(),
        smtp_username="plumbwatch",
        smtp_password=password,
        email_to="oncall@courier.example",
        delivery_retry_initial="PT0.1S",
        delivery_max_age="PT0.5S",
        delivery_poll_interval="PT0.1S",
        delivery_timeout="PT2S",
    ) as svc:
        declare(svc)
        load_drifting(svc)
        evaluate(svc)

        def failed() -> bool:
            r = svc.client.get("/v1/models/late/status", headers=svc.headers("read"))
            return bool(r.json()["deliveries"]["failed"] == 2)

        wait_until(failed, what="both deliveries failed")
        answers = [
            svc.client.get(path, headers=svc.headers("read")).text
            for path in (
                "/v1/models/late/status",
                "/v1/alerts",
                "/v1/alerts/1",
                "/v1/models/late",
                "/v1/models/late/evaluations",
                "/openapi.json",
            )
        ]
        settings_text = repr(svc.client.app.state.settings)  # type: ignore[attr-defined]
    status = answers[0]
    assert '"failed":2' in status.replace(" ", "")
    with engine.connect() as conn:
        stored = [
            str(row)
            for table in (alerts, alert_events, deliveries)
            for row in conn.execute(sa.select(table))
        ]
    errors = [r for r in stored if "Error" in r or "refused" in r.lower()]
    assert errors  # the failures were recorded, in safe words
    everything = "\n".join([caplog.text, settings_text, *answers, *stored])
    assert "ConnectError" in caplog.text or "refused" in caplog.text.lower()
    for secret in [*hook_secrets, password]:
        for form in _forms(secret):
            assert form not in everything
    assert "url-token-123" not in "\n".join([*answers, *stored])


def test_secrets_come_from_the_environment_only(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    secret = new_secret()
    file = tmp_path / "pw.toml"
    file.write_text(f'webhook_url = "http://127.0.0.1:9/h"\nwebhook_secret = "{secret}"\n')
    monkeypatch.setenv("PLUMBWATCH_CONFIG", str(file))
    with pytest.raises(ConfigError, match="environment only") as caught:
        load_settings()
    assert secret not in str(caught.value)


def test_a_malformed_secret_is_refused_without_being_repeated(monkeypatch) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.delenv("PLUMBWATCH_CONFIG", raising=False)
    bad = "whsec_not*base64*at*all"
    monkeypatch.setenv("PLUMBWATCH_WEBHOOK_SECRET", f"{new_secret()} {bad}")
    with pytest.raises(ConfigError, match="secret number 2") as caught:
        load_settings()
    assert bad not in str(caught.value) and caught.value.__cause__ is None


def test_toml_sinks_take_their_secret_from_a_named_variable(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    secret = new_secret()
    monkeypatch.setenv("ONCALL_HOOK_SECRET", secret)
    file = tmp_path / "pw.toml"
    file.write_text(
        """
[sinks.oncall]
type = "webhook"
url = "http://127.0.0.1:9/hook"
secret_env = "ONCALL_HOOK_SECRET"

[sinks.journal]
type = "log"

[routes]
critical = ["oncall", "journal"]
"""
    )
    monkeypatch.setenv("PLUMBWATCH_CONFIG", str(file))
    settings = load_settings()
    sinks = build_sinks(settings)
    assert set(sinks.by_name) == {"log", "oncall", "journal"}
    assert sinks.routing.sinks_for("critical") == ["oncall", "journal"]
    assert sinks.routing.sinks_for("warning") == ["log", "oncall", "journal"]
    assert sinks.routing.sinks_for("critical", ("log",)) == ["log"]
    assert secret not in repr(sinks)


@pytest.mark.parametrize(
    ("sinks", "routes", "message"),
    [
        ({"a": {"type": "pager"}}, {}, "type is webhook, email or log"),
        ({"a": {"type": "log", "colour": 1}}, {}, "unknown keys"),
        ({"a": {"type": "webhook", "url": "ftp://x"}}, {}, "http"),
        ({"a": {"type": "webhook", "url": "http://x", "secret_env": "NOPE_UNSET"}}, {}, "not set"),
        ({"a": {"type": "email", "to": ["x@y"]}}, {}, "smtp_host"),
        ({"log": {"type": "log"}}, {}, "taken"),
        ({}, {"critical": ["nowhere"]}, "no sink named"),
        ({}, {"loud": ["log"]}, "not a severity"),
    ],
)
def test_bad_sink_config_says_what(sinks, routes, message) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(ConfigError, match=message):
        build_sinks(Settings(sinks=sinks, routes=routes))


def test_a_webhook_needs_its_secret() -> None:
    with pytest.raises(ConfigError, match="needs a secret"):
        build_sinks(Settings(webhook_url="http://127.0.0.1:9/h"))
    settings = Settings(
        webhook_url="http://127.0.0.1:9/h", webhook_secret=new_secret(), smtp_password="pw1"
    )
    assert len(secrets_of(settings)) == 2
    assert "pw1" not in repr(settings) and "pw1" not in str(settings.model_dump())
