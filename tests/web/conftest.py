"""The seeded service, built once per engine per session (about 15 s each), and a
per-test view of it with the hand-built alerts patched in."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import upgrade
from tests.conftest import postgres_schema
from tests.web.seed import Seeded, patch_alerts, seeded_service


@pytest.fixture(
    scope="session",
    params=[
        pytest.param("sqlite", id="sqlite"),
        pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
    ],
)
def seeded_engine_url(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[str]:
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path_factory.mktemp('pages') / 'pages.db'}"
        return
    with postgres_schema() as url:
        yield url


@pytest.fixture(scope="session")
def seeded(seeded_engine_url: str) -> Iterator[Seeded]:
    engine = create_engine(seeded_engine_url)
    upgrade(engine)
    with seeded_service(engine) as svc:
        yield svc
    engine.dispose()


@pytest.fixture
def pages(seeded: Seeded, monkeypatch: pytest.MonkeyPatch) -> Seeded:
    patch_alerts(monkeypatch, seeded)
    return seeded


@pytest.fixture
def artifacts() -> Path:
    """Where screenshots go (gitignored), for people to look at after a run."""
    path = Path(__file__).resolve().parents[2] / "test-artifacts" / "pages"
    path.mkdir(parents=True, exist_ok=True)
    return path
