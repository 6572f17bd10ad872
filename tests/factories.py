"""Builders for test data: declarations, rows, tokens, a running app."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy.engine import Engine

from plumbwatch.api import create_app
from plumbwatch.config import Settings
from plumbwatch.store import tokens
from plumbwatch.timefmt import parse_instant, to_micros

# A fixed "now" for the app under test, so future-tolerance checks are exact.
NOW = "2026-06-01T12:00:00Z"
NOW_US = to_micros(parse_instant(NOW))


def binary_model(**overrides: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "kind": "binary",
        "label_horizon": "P5D",
        "segment_keys": ["region", "tier"],
        "crosses": [["region", "tier"]],
        "description": "late delivery",
    }
    body.update(overrides)
    return body


def multiclass_model(**overrides: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "kind": "multiclass",
        "classes": ["on_time", "late", "lost"],
        "label_horizon": "P10D",
        "segment_keys": ["region"],
    }
    body.update(overrides)
    return body


def prediction(i: int | str, **overrides: Any) -> dict[str, Any]:
    row: dict[str, Any] = {
        "id": f"p-{i}",
        "predicted_at": "2026-05-30T08:00:00Z",
        "probability": 0.25,
        "version": "v1",
        "segments": {"region": "coast", "tier": "express"},
    }
    row.update(overrides)
    return row


def outcome(i: int | str, **overrides: Any) -> dict[str, Any]:
    row: dict[str, Any] = {"id": f"p-{i}", "outcome": 1, "observed_at": "2026-05-31T09:00:00Z"}
    row.update(overrides)
    return row


@dataclass
class Service:
    client: TestClient
    engine: Engine
    tokens: dict[str, str]

    def headers(self, who: str = "admin") -> dict[str, str]:
        return {"Authorization": f"Bearer {self.tokens[who]}"}

    def put_model(self, name: str, body: dict[str, Any]) -> Any:
        response = self.client.put(f"/v1/models/{name}", json=body, headers=self.headers())
        assert response.status_code in (200, 201), response.text
        return response.json()

    def post(self, path: str, body: Any, who: str = "admin", **kw: Any) -> Any:
        return self.client.post(path, json=body, headers=self.headers(who), **kw)


def make_token(
    engine: Engine,
    name: str,
    scope: str,
    model_id: int | None = None,
    expires_at_us: int | None = None,
) -> str:
    with engine.begin() as conn:
        _, secret = tokens.create(
            conn=conn,
            name=name,
            scope=scope,
            model_id=model_id,
            expires_at_us=expires_at_us,
            now_us=NOW_US,
        )
    return secret


@contextmanager
def running_service(engine: Engine, **settings: Any) -> Iterator[Service]:
    """The app on a migrated engine, with admin, ingest and read tokens."""
    settings.setdefault("scheduler", "off")
    config = Settings(database_url=str(engine.url), **settings)
    app = create_app(config, engine=engine, clock_us=lambda: NOW_US)
    secrets = {
        scope: make_token(engine, f"t-{scope}", scope) for scope in ("admin", "ingest", "read")
    }
    with TestClient(app) as client:
        yield Service(client=client, engine=engine, tokens=secrets)
