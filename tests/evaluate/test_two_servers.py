"""Two real `plumbwatch serve` processes on one database: each model is evaluated once
per tick (leases plus the per-slot check), and no evaluation record is duplicated."""

from __future__ import annotations

import time
from collections import Counter
from pathlib import Path

import httpx
import pytest
import sqlalchemy as sa

from plumbwatch.store.engine import create_engine
from plumbwatch.store.tables import evaluations
from tests import live


def test_each_model_once_per_tick(database_url: str, tmp_path: Path) -> None:
    if not database_url.startswith("postgresql"):
        pytest.skip("replicas share PostgreSQL; SQLite is one server's embedded database")
    token = live.migrate_and_token(database_url)
    env = {"PLUMBWATCH_SCHEDULER": "on", "PLUMBWATCH_EVALUATION_INTERVAL": "PT2S"}
    with live.served(database_url, tmp_path / "a.log", env=env) as a:
        for name in ("late", "claims"):
            live.declare_binary_model(a.url, token, name)
        rows = [
            {"id": f"r{i}", "predicted_at": "2026-01-01T00:00:00Z", "probability": 0.2}
            for i in range(50)
        ]
        r = httpx.post(
            f"{a.url}/v1/models/late/predictions",
            json={"predictions": rows},
            headers={"Authorization": f"Bearer {token}"},
            timeout=30,
        )
        assert r.status_code == 200
        with live.served(database_url, tmp_path / "b.log", env=env):
            time.sleep(9)  # four or five ticks of two seconds on each server
    engine = create_engine(database_url)
    with engine.connect() as conn:
        rows = conn.execute(sa.select(evaluations.c.model_id, evaluations.c.as_of_us)).all()
    engine.dispose()
    per_slot = Counter(rows)
    assert len({m for m, _ in rows}) == 2  # both models were evaluated
    assert len(per_slot) >= 6  # at least three ticks each
    assert max(per_slot.values()) == 1, per_slot  # never twice for one (model, tick)
