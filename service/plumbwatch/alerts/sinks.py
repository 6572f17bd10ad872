"""Sinks: where alert events go. Each does its own I/O and reports failure as
``SinkError`` with a message that is safe to log and show (no secret, no URL).

Built in, by name:

- ``webhook``: ``PLUMBWATCH_WEBHOOK_URL`` signed with ``PLUMBWATCH_WEBHOOK_SECRET``;
- ``email``: the ``smtp_*`` settings, to ``email_to`` (when both are set);
- ``log``: one WARNING line per event on the ``plumbwatch.alerts`` logger (always).

More in the TOML file, each under its own name::

    [sinks.oncall]
    type = "webhook"
    url = "https://hooks.example.org/plumbwatch"
    secret_env = "ONCALL_WEBHOOK_SECRET"     # the variable holding whsec_... (space-separated
                                             # during a rotation); never the secret itself
    [sinks.data-team]
    type = "email"
    to = ["data-team@courier.example"]       # via the smtp_* settings
    [sinks.journal]
    type = "log"

    [routes]                                 # severity -> sinks; unset: every sink
    critical = ["oncall", "data-team"]
    warning = ["data-team"]

A rule's own ``sinks`` list wins over the routes.
"""

from __future__ import annotations

import logging
import os
import re
import smtplib
import ssl
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from email.message import EmailMessage
from typing import Any, Protocol

import httpx
import orjson

from plumbwatch.alerts import signing
from plumbwatch.config import Settings, decode_webhook_secret
from plumbwatch.errors import ConfigError
from plumbwatch.rulespec import SEVERITIES

log = logging.getLogger("plumbwatch.alerts")

SINK_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")


class SinkError(Exception):
    """A delivery attempt failed; the message is safe to store, log and show."""


class Sink(Protocol):
    name: str

    def send(self, *, event_id: str, body: str) -> None:
        """Deliver one event (raise SinkError on failure)."""


def redact(text: str, secrets: list[str]) -> str:
    for secret in secrets:
        if secret:
            text = text.replace(secret, "[redacted]")
    return text


@dataclass
class WebhookSink:
    """POST the JSON body, signed per Standard Webhooks; any 2xx is a delivery."""

    name: str
    url: str
    secrets: list[str] = field(repr=False)
    timeout_s: float = 10.0
    transport: httpx.BaseTransport | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        if not self.secrets:
            raise ConfigError(f"webhook sink {self.name!r} needs a secret (whsec_ + base64)")
        for secret in self.secrets:
            try:
                decode_webhook_secret(secret)
            except ValueError as exc:
                raise ConfigError(f"webhook sink {self.name!r}: {exc}") from None

    def send(self, *, event_id: str, body: str) -> None:
        content = body.encode()
        # The timestamp is the wall clock of this attempt: receivers reject old ones.
        headers = signing.headers(
            self.secrets, msg_id=event_id, timestamp=int(time.time()), body=content
        )
        headers["content-type"] = "application/json"
        try:
            with httpx.Client(timeout=self.timeout_s, transport=self.transport) as client:
                response = client.post(self.url, content=content, headers=headers)
        except httpx.TimeoutException:
            raise SinkError(f"no answer within {self.timeout_s:g} s") from None
        except httpx.HTTPError as exc:
            raise SinkError(self._safe(f"{type(exc).__name__}: {exc}")) from None
        if not 200 <= response.status_code < 300:
            raise SinkError(f"the receiver answered HTTP {response.status_code}")

    def _safe(self, text: str) -> str:
        return redact(text, [*self.secrets, self.url])


@dataclass
class EmailSink:
    """One plain-text email per event through an SMTP server (stdlib smtplib)."""

    name: str
    host: str
    port: int
    to: list[str]
    sender: str
    starttls: bool = True
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    ca_file: str | None = None
    timeout_s: float = 10.0

    def send(self, *, event_id: str, body: str) -> None:
        message = email_message(event_id=event_id, body=body, sender=self.sender, to=self.to)
        try:
            with smtplib.SMTP(self.host, self.port, timeout=self.timeout_s) as smtp:
                if self.starttls:
                    smtp.starttls(context=ssl.create_default_context(cafile=self.ca_file))
                if self.username:
                    smtp.login(self.username, self.password or "")
                smtp.send_message(message)
        except (smtplib.SMTPException, OSError) as exc:
            text = f"{type(exc).__name__}: {exc}"
            raise SinkError(redact(text, [self.password or ""])) from None


def email_message(*, event_id: str, body: str, sender: str, to: list[str]) -> EmailMessage:
    data = orjson.loads(body)
    alert = data["data"]
    message = EmailMessage()
    message["Subject"] = f"[plumbwatch] {alert['summary']}"
    message["From"] = sender
    message["To"] = ", ".join(to)
    # The event id as Message-ID lets mail tools drop a re-sent copy.
    message["Message-ID"] = f"<{event_id}@plumbwatch>"
    lines = [
        alert["summary"],
        "",
        f"state: {alert['state']} (since {alert['since']})",
        f"model: {alert['model']}   version: {alert.get('version') or 'all'}",
        f"slice: {alert['slice']}   window: {alert.get('window') or '-'}",
        "",
        "values:",
        *(f"  {k}: {v}" for k, v in sorted(alert.get("values", {}).items())),
        "",
        f"status page: {alert['link']}",
        f"event id: {event_id}",
    ]
    message.set_content("\n".join(lines) + "\n")
    return message


@dataclass
class LogSink:
    name: str = "log"

    def send(self, *, event_id: str, body: str) -> None:
        alert = orjson.loads(body)["data"]
        log.warning(
            "%s | state=%s values=%s event=%s %s",
            alert["summary"],
            alert["state"],
            orjson.dumps(alert.get("values", {})).decode(),
            event_id,
            alert["link"],
        )


@dataclass(frozen=True)
class Routing:
    """Which sinks an alert's events go to (names only; pure)."""

    names: tuple[str, ...] = ("log",)
    routes: Mapping[str, tuple[str, ...]] = field(default_factory=dict)

    def sinks_for(self, severity: str, explicit: tuple[str, ...] | None = None) -> list[str]:
        if explicit is not None:
            return list(explicit)
        if severity in self.routes:
            return list(self.routes[severity])
        return list(self.names)


@dataclass
class Sinks:
    by_name: dict[str, Sink]
    routing: Routing

    def get(self, name: str) -> Sink | None:
        return self.by_name.get(name)


def _emails(text: str | list[str] | None) -> list[str]:
    if text is None:
        return []
    items = text if isinstance(text, list) else re.split(r"[,\s]+", text)
    return [t.strip() for t in items if t and t.strip()]


def _env_secrets(sink: str, variable: Any) -> list[str]:
    if not isinstance(variable, str) or not variable:
        raise ConfigError(f"[sinks.{sink}]: secret_env names an environment variable")
    value = os.environ.get(variable)
    if not value:
        raise ConfigError(f"[sinks.{sink}]: environment variable {variable} is not set")
    return value.split()


def build_sinks(settings: Settings, *, transport: httpx.BaseTransport | None = None) -> Sinks:
    """The sinks and routes of these settings; ConfigError naming any problem."""
    timeout = settings.seconds("delivery_timeout")
    by_name: dict[str, Sink] = {"log": LogSink()}
    if settings.webhook_url:
        by_name["webhook"] = WebhookSink(
            "webhook", settings.webhook_url, settings.webhook_secrets(), timeout, transport
        )
    elif settings.webhook_secret:
        raise ConfigError("PLUMBWATCH_WEBHOOK_SECRET is set without PLUMBWATCH_WEBHOOK_URL")

    def email(name: str, to: list[str]) -> EmailSink:
        if not settings.smtp_host:
            raise ConfigError(f"email sink {name!r} needs smtp_host (PLUMBWATCH_SMTP_HOST)")
        if not to:
            raise ConfigError(f"email sink {name!r} has no recipients")
        password = settings.smtp_password.get_secret_value() if settings.smtp_password else None
        return EmailSink(
            name,
            settings.smtp_host,
            settings.smtp_port,
            to,
            settings.smtp_from,
            settings.smtp_starttls,
            settings.smtp_username,
            password,
            settings.smtp_ca_file,
            timeout,
        )

    if settings.email_to:
        by_name["email"] = email("email", _emails(settings.email_to))
    for name, spec in settings.sinks.items():
        if not SINK_NAME.match(name):
            raise ConfigError(f"[sinks.{name}]: invalid sink name")
        if name in by_name:
            raise ConfigError(f"[sinks.{name}]: the name {name!r} is taken by a built-in sink")
        kind = spec.get("type")
        allowed = {
            "webhook": {"type", "url", "secret_env"},
            "email": {"type", "to"},
            "log": {"type"},
        }
        if kind not in allowed:
            raise ConfigError(f"[sinks.{name}]: type is webhook, email or log")
        unknown = set(spec) - allowed[kind]
        if unknown:
            raise ConfigError(f"[sinks.{name}]: unknown keys {sorted(unknown)}")
        if kind == "webhook":
            url = spec.get("url")
            if not isinstance(url, str) or not url.startswith(("http://", "https://")):
                raise ConfigError(f"[sinks.{name}]: url is an http(s) URL")
            by_name[name] = WebhookSink(
                name, url, _env_secrets(name, spec.get("secret_env")), timeout, transport
            )
        elif kind == "email":
            by_name[name] = email(name, _emails(spec.get("to")))
        else:
            by_name[name] = LogSink(name)
    routes: dict[str, tuple[str, ...]] = {}
    for severity, names in settings.routes.items():
        if severity not in SEVERITIES:
            raise ConfigError(f"[routes]: {severity!r} is not a severity ({', '.join(SEVERITIES)})")
        missing = [n for n in names if n not in by_name]
        if missing:
            raise ConfigError(f"[routes] {severity}: no sink named {', '.join(missing)}")
        routes[severity] = tuple(names)
    return Sinks(by_name, Routing(tuple(by_name), routes))


def secrets_of(settings: Settings) -> list[str]:
    """Every secret the settings hold (to check nothing prints them)."""
    out = settings.webhook_secrets()
    if settings.smtp_password:
        out.append(settings.smtp_password.get_secret_value())
    return out
