"""Schema-driven fuzzing of every operation in the app's own OpenAPI document.

The app runs in this process under uvicorn on a free port (so its lifespan and
writer thread start and stop cleanly) and schemathesis generates requests from
``create_app(...).openapi()``. SQLite only: the point is the HTTP contract (no
5xx, documented status codes, bodies and content types as published), which
does not depend on the engine; the engine matrix lives in the other API tests.
"""

from __future__ import annotations

import random
import threading
import time
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest
import schemathesis
import uvicorn
from hypothesis import HealthCheck, given, settings
from schemathesis import checks

from plumbwatch.api import create_app
from plumbwatch.config import Settings
from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import upgrade
from tests.factories import binary_model, make_token, outcome, prediction
from tests.live import free_port

MODEL = "fuzzed"
ALERT_RULES = [
    {
        "name": "oe-high",
        "condition": "metric",
        "metric": "oe_ratio",
        "above": 1.5,
        "min_events": 0,
        "raise_after": 1,
    },
]
CHECKS = [
    checks.not_a_server_error,
    checks.response_schema_conformance,
    checks.status_code_conformance,
    checks.content_type_conformance,
]


@dataclass
class Live:
    url: str
    headers: dict[str, str]


@pytest.fixture(scope="module")
def live_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Live]:
    path: Path = tmp_path_factory.mktemp("fuzz") / "plumbwatch.db"
    engine = create_engine(f"sqlite:///{path}")
    upgrade(engine)
    token = make_token(engine, "fuzz-admin", "admin")
    app = create_app(Settings(database_url=str(engine.url), scheduler="off"), engine=engine)
    server = uvicorn.Server(
        uvicorn.Config(app, host="127.0.0.1", port=free_port(), log_level="warning")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    url = f"http://127.0.0.1:{server.config.port}"
    headers = {"Authorization": f"Bearer {token}"}
    try:
        deadline = time.monotonic() + 20
        while not server.started:
            assert thread.is_alive() and time.monotonic() < deadline, "uvicorn did not start"
            time.sleep(0.02)
        # A declared model with a few rows, so forced paths reach real validation and
        # real duplicates, not only 404s.
        httpx.put(
            f"{url}/v1/models/{MODEL}",
            json=binary_model(rules=ALERT_RULES),
            headers=headers,
            timeout=10,
        ).raise_for_status()
        httpx.post(
            f"{url}/v1/models/{MODEL}/predictions",
            json={"predictions": [prediction(i) for i in range(3)]},
            headers=headers,
            timeout=10,
        ).raise_for_status()
        # Outcomes that contradict the probabilities and an evaluation: real alerts, so
        # the alert operations reach their real code, not only 404s.
        httpx.post(
            f"{url}/v1/models/{MODEL}/outcomes",
            json={"outcomes": [outcome(i) for i in range(3)]},
            headers=headers,
            timeout=10,
        ).raise_for_status()
        evaluated = httpx.post(
            f"{url}/v1/models/{MODEL}/evaluations",
            json={"as_of": "2026-06-05T00:00:00Z"},
            headers=headers,
            timeout=60,
        ).raise_for_status()
        assert evaluated.json()["alerts"], "the fixture should have raised alerts"
        # Then matured, labelled rows and a later evaluation for the read endpoints.
        _evaluated(url, headers)
        yield Live(url, headers)
    finally:
        server.should_exit = True
        thread.join(timeout=20)
        engine.dispose()


def _evaluated(url: str, headers: dict[str, str]) -> None:
    """Matured, labelled rows and one evaluation: status, evaluations, evidence and the
    recalibration advice then answer with real bodies, checked against their schemas."""
    rng = random.Random(5)
    preds, outs = [], []
    for i in range(1200):
        p = rng.uniform(0.05, 0.9)
        at = f"2026-05-{10 + i % 14:02d}T{i % 24:02d}:00:00Z"
        preds.append(prediction(f"e{i}", predicted_at=at, probability=p))
        outs.append(outcome(f"e{i}", outcome=int(rng.random() < p), observed_at=at))
    for path, key, rows in (("predictions", "predictions", preds), ("outcomes", "outcomes", outs)):
        httpx.post(
            f"{url}/v1/models/{MODEL}/{path}", json={key: rows}, headers=headers, timeout=30
        ).raise_for_status()
    httpx.post(
        f"{url}/v1/models/{MODEL}/evaluations", json={}, headers=headers, timeout=120
    ).raise_for_status()


def _schema() -> schemathesis.BaseSchema:
    # The document the app publishes; building it needs no database.
    app = create_app(Settings(database_url="sqlite://", scheduler="off"))
    return schemathesis.openapi.from_dict(app.openapi())


SCHEMA = _schema()
# One test per operation, driven by hypothesis directly: schemathesis' own pytest
# collector does not run on this pytest version.
OPERATIONS = [result.ok() for result in SCHEMA.get_all_operations()]


@pytest.mark.parametrize("operation", OPERATIONS, ids=lambda op: op.label)
def test_api_contract(operation: schemathesis.APIOperation, live_app: Live) -> None:
    @settings(
        max_examples=50,
        deadline=None,
        suppress_health_check=list(HealthCheck),
        derandomize=True,
        database=None,
    )
    @given(case=operation.as_strategy())
    def fuzz(case: schemathesis.Case) -> None:
        # Half the cases that name a model name the declared one (picked from the
        # generated name, so a run is reproducible), so ingest and reads get past the
        # 404. DELETE and PUT keep their generated names: they would archive or
        # redeclare it.
        params = case.path_parameters
        if (
            params
            and "model" in params
            and case.method.upper() in ("GET", "POST")
            and zlib.crc32(str(params["model"]).encode()) % 2 == 0
        ):
            params["model"] = MODEL
        if params and "alert_id" in params and zlib.crc32(str(params["alert_id"]).encode()) % 2:
            params["alert_id"] = 1  # an alert the fixture raised
        case.call_and_validate(
            base_url=live_app.url, headers=live_app.headers, checks=CHECKS, timeout=30
        )

    fuzz()
