"""Shared fixtures: one engine fixture parametrised over SQLite and PostgreSQL.

Every database test runs twice. PostgreSQL tests use a fresh schema per test on
the server at ``PLUMBWATCH_TEST_POSTGRES_URL`` (default: the local ``test``
database); when that server does not answer they are skipped, unless
``PLUMBWATCH_REQUIRE_POSTGRES=1`` (set by ``.ci/run``) turns the skip into a failure.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import upgrade
from tests.live import engine_params as live_engine_params

POSTGRES_URL = os.environ.get(
    "PLUMBWATCH_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
REQUIRE_POSTGRES = os.environ.get("PLUMBWATCH_REQUIRE_POSTGRES") == "1"


def _postgres_available() -> str | None:
    try:
        probe = sa.create_engine(POSTGRES_URL, connect_args={"connect_timeout": 3})
        with probe.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
        probe.dispose()
    except Exception as exc:  # any failure means: no PostgreSQL for this run
        return f"{type(exc).__name__}: {exc}"
    return None


_PG_PROBLEM: str | bool | None = False  # False: not probed yet


def require_postgres() -> None:
    global _PG_PROBLEM
    if _PG_PROBLEM is False:
        _PG_PROBLEM = _postgres_available()
    if _PG_PROBLEM:
        message = f"PostgreSQL not reachable at {POSTGRES_URL} ({_PG_PROBLEM})"
        if REQUIRE_POSTGRES:
            pytest.fail(message)
        pytest.skip(message)


def postgres_schema_url(schema: str) -> str:
    url = sa.engine.make_url(POSTGRES_URL)
    return url.update_query_dict({"options": f"-csearch_path={schema}"}).render_as_string(
        hide_password=False
    )


@contextmanager
def postgres_schema() -> Iterator[str]:
    """A URL to a fresh schema on the test PostgreSQL, dropped afterwards."""
    require_postgres()
    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(POSTGRES_URL)
    with admin.begin() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield postgres_schema_url(schema)
    finally:
        with admin.begin() as conn:
            conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@pytest.fixture
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A URL to an empty database of the parametrised kind, removed afterwards."""
    kind = request.param
    if kind == "sqlite":
        yield f"sqlite:///{tmp_path / 'plumbwatch.db'}"
        return
    with postgres_schema() as url:
        yield url


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    if "database_url" in metafunc.fixturenames:
        metafunc.parametrize(
            "database_url",
            [
                pytest.param("sqlite", id="sqlite"),
                pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
            ],
            indirect=True,
        )


@pytest.fixture
def empty_engine(database_url: str) -> Iterator[Engine]:
    engine = create_engine(database_url)
    yield engine
    engine.dispose()


@pytest.fixture
def engine(empty_engine: Engine) -> Engine:
    """A migrated database of the parametrised kind."""
    upgrade(empty_engine)
    return empty_engine


@pytest.fixture(scope="session", params=live_engine_params())
def live_service(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[Any, str]]:
    """One real ``plumbwatch serve`` per engine, shared by the tests that talk HTTP
    (client, loader, demo replay); each test uses models of its own."""
    from tests import live

    with live.service(request.param, tmp_path_factory.mktemp("live")) as found:
        yield found
