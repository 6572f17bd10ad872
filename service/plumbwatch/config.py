"""Settings: one class, built once at start (CLI or ``create_app``) and passed down.

Values come from, highest priority first: explicit keyword arguments,
``PLUMBWATCH_*`` environment variables, the optional TOML file named by
``PLUMBWATCH_CONFIG``, then the defaults below, which work on a laptop.

The TOML file may also declare monitored models under ``[models.<name>]``
tables with the body of ``PUT /v1/models/{model}``; they are applied at start.
It may declare alert sinks under ``[sinks.<name>]`` and routes under ``[routes]``
(see ``plumbwatch.alerts.sinks``). Secrets (webhook secrets, the SMTP password)
come from the environment only, never from the file.
"""

from __future__ import annotations

import base64
import binascii
import os
import tomllib
from pathlib import Path
from typing import Any

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, PydanticBaseSettingsSource, SettingsConfigDict

from plumbwatch.errors import ConfigError
from plumbwatch.timefmt import parse_duration

WEBHOOK_SECRET_PREFIX = "whsec_"


def decode_webhook_secret(secret: str) -> bytes:
    """The HMAC key of a Standard Webhooks secret (``whsec_`` + base64).

    Raises ValueError with a message that never contains the secret.
    """
    if not secret.startswith(WEBHOOK_SECRET_PREFIX):
        raise ValueError(f"a webhook secret starts with {WEBHOOK_SECRET_PREFIX}")
    body = secret[len(WEBHOOK_SECRET_PREFIX) :]
    try:
        key = base64.b64decode(body + "=" * (-len(body) % 4), validate=True)
    except (ValueError, binascii.Error):
        raise ValueError(f"a webhook secret is {WEBHOOK_SECRET_PREFIX} + base64") from None
    if len(key) < 16:
        raise ValueError("a webhook secret holds at least 16 bytes (24 base64 characters)")
    return key


# Secrets are read from the environment only, so a config file can be shared or
# committed without leaking them.
_ENV_ONLY = {"webhook_secret", "smtp_password"}


class _TomlSource(PydanticBaseSettingsSource):
    """Reads the TOML file named by ``PLUMBWATCH_CONFIG`` (or the ``config`` field)."""

    def __init__(self, settings_cls: type[BaseSettings], path: str | None) -> None:
        super().__init__(settings_cls)
        self._data: dict[str, Any] = {}
        if path:
            file = Path(path)
            if not file.is_file():
                raise ConfigError(f"config file {path} (PLUMBWATCH_CONFIG) does not exist")
            try:
                self._data = tomllib.loads(file.read_text(encoding="utf-8"))
            except tomllib.TOMLDecodeError as exc:
                raise ConfigError(f"config file {path} is not valid TOML: {exc}") from exc
            secrets = sorted(set(self._data) & _ENV_ONLY)
            if secrets:
                raise ConfigError(
                    f"config file {path} sets {', '.join(secrets)}: secrets come from the "
                    "environment only (PLUMBWATCH_" + secrets[0].upper() + ")"
                )

    def get_field_value(self, field: Any, field_name: str) -> tuple[Any, str, bool]:
        return self._data.get(field_name), field_name, False

    def __call__(self) -> dict[str, Any]:
        return dict(self._data)


class Settings(BaseSettings):
    """Every setting of plumbwatch, with the environment variable that sets it."""

    model_config = SettingsConfigDict(env_prefix="PLUMBWATCH_", extra="forbid")

    config: str | None = Field(None, description="path of the optional TOML file")
    database_url: str = Field(
        "sqlite:///./var/plumbwatch.db", description="SQLAlchemy URL; sqlite or postgresql"
    )
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)
    max_batch_rows: int = Field(10_000, ge=1, description="rows per ingest request")
    max_body_bytes: int = Field(32 * 1024 * 1024, ge=1024, description="ingest body size")
    future_tolerance: str = Field(
        "PT1H", description="how far in the future a predicted_at or observed_at may lie"
    )
    probability_sum_tolerance: float = Field(
        1e-6, gt=0, lt=0.1, description="multiclass probabilities must sum to 1 within this"
    )
    sqlite_busy_timeout_ms: int = Field(30_000, ge=0)
    scheduler: str = Field("on", pattern="^(on|off)$", description="in-process evaluation")
    evaluation_interval: str = Field("PT5M", description="how often the scheduler evaluates")
    slice_cap: int = Field(50, ge=1, description="values kept per segment key; rest: other")
    retention_days: int | None = Field(
        None, ge=1, description="prune raw rows older than this many days (None: keep all)"
    )
    min_events: int = Field(
        100, ge=1, description="events and non-events a slice needs for a verdict"
    )
    evidence_alpha: float = Field(
        0.01, gt=0, lt=1, description="paging threshold of evidence: K / alpha for K slices"
    )
    fdr_alpha: float = Field(
        0.05, gt=0, lt=1, description="per-run false discovery rate; discoveries set `watch`"
    )
    materiality_ece: float = Field(
        0.03, ge=0, description="ece_debiased at or above this is material"
    )
    materiality_log_oe: float = Field(
        0.1, ge=0, description="|ln O/E| at or above this is material"
    )
    evidence_grace: str = Field(
        "P1D", description="evidence waits this long past maturity for late-posted outcomes"
    )
    cusum_arl0: int = Field(
        10_000, ge=100, description="in-control mean run length of each slice's CUSUM, rows"
    )
    public_pages: bool = Field(
        False, description="pages and /metrics readable without a token (closed networks)"
    )
    session_key: str | None = Field(
        None,
        min_length=16,
        description="signs browser sessions; set it when several servers share a database",
    )
    metrics_slice_cap: int = Field(
        25, ge=1, description="slice entries per model and window exported on /metrics"
    )
    models: dict[str, dict[str, Any]] = Field(
        default_factory=dict, description="model declarations from the TOML file"
    )

    # -- alerts ----------------------------------------------------------------------------
    no_predictions_after: str = Field(
        "P1D", description="default rule: alert when no prediction arrived for this long"
    )
    no_outcomes_after: str = Field(
        "P2D", description="default rule: alert when rows matured this long without outcomes"
    )
    public_url: str | None = Field(
        None, description="base of links to status pages (default http://host:port)"
    )
    webhook_url: str | None = Field(None, description="one webhook sink without a config file")
    webhook_secret: SecretStr | None = Field(
        None, description="whsec_ + base64; several separated by spaces during a rotation"
    )
    smtp_host: str | None = Field(None, description="email sink: SMTP server (unset: no email)")
    smtp_port: int = Field(587, ge=1, le=65535)
    smtp_starttls: bool = Field(True, description="upgrade the SMTP connection with STARTTLS")
    smtp_ca_file: str | None = Field(None, description="CA bundle for a private SMTP server")
    smtp_username: str | None = None
    smtp_password: SecretStr | None = None
    smtp_from: str = "plumbwatch@localhost"
    email_to: str | None = Field(None, description="recipients, separated by commas or spaces")
    delivery_poll_interval: str = Field("PT2S", description="how often the sender looks")
    delivery_retry_initial: str = Field("PT10S", description="first retry delay (doubles)")
    delivery_retry_max: str = Field("PT10M", description="longest delay between attempts")
    delivery_max_age: str = Field("P1D", description="then a delivery is given up (failed)")
    delivery_timeout: str = Field("PT10S", description="one attempt's network timeout")
    delivery_claim: str = Field(
        "PT2M", description="how long a server owns a delivery it is sending"
    )
    sinks: dict[str, dict[str, Any]] = Field(
        default_factory=dict, description="extra sinks from the TOML file ([sinks.<name>])"
    )
    routes: dict[str, list[str]] = Field(
        default_factory=dict, description="severity -> sink names ([routes] in the TOML file)"
    )

    @field_validator(
        "future_tolerance",
        "evaluation_interval",
        "evidence_grace",
        "no_predictions_after",
        "no_outcomes_after",
        "delivery_poll_interval",
        "delivery_retry_initial",
        "delivery_retry_max",
        "delivery_max_age",
        "delivery_timeout",
        "delivery_claim",
    )
    @classmethod
    def _duration(cls, value: str) -> str:
        if parse_duration(value).total_seconds() < 0:
            raise ValueError("must not be negative")
        return value

    @field_validator("webhook_secret")
    @classmethod
    def _webhook_secret(cls, value: SecretStr | None) -> SecretStr | None:
        # The message never repeats the value: settings errors are printed and logged.
        if value is not None:
            parts = value.get_secret_value().split()
            if not parts:
                return None
            for i, part in enumerate(parts):
                try:
                    decode_webhook_secret(part)
                except ValueError as exc:
                    raise ValueError(f"secret number {i + 1}: {exc}") from None
        return value

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        path = init_settings().get("config") or os.environ.get("PLUMBWATCH_CONFIG")
        return (init_settings, env_settings, _TomlSource(settings_cls, path))

    @property
    def evaluation_interval_seconds(self) -> float:
        return parse_duration(self.evaluation_interval).total_seconds()

    @property
    def evidence_grace_micros(self) -> int:
        return int(parse_duration(self.evidence_grace).total_seconds() * 1_000_000)

    @property
    def future_tolerance_micros(self) -> int:
        return int(parse_duration(self.future_tolerance).total_seconds() * 1_000_000)

    def seconds(self, name: str) -> float:
        """A duration setting (e.g. ``delivery_timeout``) in seconds."""
        return parse_duration(getattr(self, name)).total_seconds()

    @property
    def link_base(self) -> str:
        """Where people reach this server: ``public_url``, else http://host:port."""
        return (self.public_url or f"http://{self.host}:{self.port}").rstrip("/")

    def webhook_secrets(self) -> list[str]:
        return self.webhook_secret.get_secret_value().split() if self.webhook_secret else []


def load_settings(**overrides: Any) -> Settings:
    """Build the settings, turning validation problems into one readable ConfigError."""
    from pydantic import ValidationError

    try:
        return Settings(**overrides)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in err['loc'])}: {err['msg']}" for err in exc.errors()
        )
        # from None: a chained pydantic error would print the rejected input (a secret).
        raise ConfigError(f"invalid settings: {problems}") from None
