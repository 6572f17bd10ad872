"""Settings: one class, built once at start (CLI or ``create_app``) and passed down.

Values come from, highest priority first: explicit keyword arguments,
``PLUMBWATCH_*`` environment variables, the optional TOML file named by
``PLUMBWATCH_CONFIG``, then the defaults below, which work on a laptop.

The TOML file may also declare monitored models under ``[models.<name>]``
tables with the body of ``PUT /v1/models/{model}``; they are applied at start.
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path
from typing import Any

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, PydanticBaseSettingsSource, SettingsConfigDict

from plumbwatch.errors import ConfigError
from plumbwatch.timefmt import parse_duration


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

    @field_validator("future_tolerance", "evaluation_interval")
    @classmethod
    def _duration(cls, value: str) -> str:
        parse_duration(value)
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
    def future_tolerance_micros(self) -> int:
        return int(parse_duration(self.future_tolerance).total_seconds() * 1_000_000)


def load_settings(**overrides: Any) -> Settings:
    """Build the settings, turning validation problems into one readable ConfigError."""
    from pydantic import ValidationError

    try:
        return Settings(**overrides)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in err['loc'])}: {err['msg']}" for err in exc.errors()
        )
        raise ConfigError(f"invalid settings: {problems}") from exc
