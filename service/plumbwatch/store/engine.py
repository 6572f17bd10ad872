"""Engine set-up for SQLite (embedded default) and PostgreSQL (production)."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Engine, make_url

BEGIN_OPTION = "plumbwatch_begin"


def create_engine(url: str, *, busy_timeout_ms: int = 30_000, **kwargs: Any) -> Engine:
    """Create the engine with the SQLite pragmas of DESIGN.md, or a PostgreSQL pool.

    SQLite: WAL, ``synchronous=FULL`` (an acknowledged batch survives power loss),
    foreign keys on, a busy timeout. Transactions begin explicitly so a writer can
    ask for ``BEGIN IMMEDIATE`` (``execution_options(plumbwatch_begin="IMMEDIATE")``)
    and take the write lock up front instead of failing on upgrade.
    """
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        database = parsed.database
        if database and database != ":memory:":
            Path(database).parent.mkdir(parents=True, exist_ok=True)
        engine = sa.create_engine(
            url,
            connect_args={"timeout": busy_timeout_ms / 1000, "check_same_thread": False},
            **kwargs,
        )

        @sa.event.listens_for(engine, "connect")
        def _pragmas(dbapi_conn: Any, _record: Any) -> None:
            dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=FULL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
            cur.execute("PRAGMA cache_size=-65536")  # 64 MiB per connection
            cur.execute("PRAGMA wal_autocheckpoint=16000")
            cur.close()

        @sa.event.listens_for(engine, "begin")
        def _begin(conn: sa.Connection) -> None:
            mode = conn.get_execution_options().get(BEGIN_OPTION, "")
            conn.exec_driver_sql(f"BEGIN {mode}".strip())

        return engine
    if parsed.get_backend_name() == "postgresql":
        if parsed.drivername == "postgresql":
            parsed = parsed.set(drivername="postgresql+psycopg")
        kwargs.setdefault("pool_pre_ping", True)
        return sa.create_engine(parsed, **kwargs)
    raise ValueError(f"unsupported database URL {url!r}: use sqlite:/// or postgresql://")


@contextmanager
def writing(engine: Engine) -> Iterator[sa.Connection]:
    """A connection in a transaction that will write, committed on success.

    On SQLite it begins IMMEDIATE and so takes the write lock up front: a deferred
    transaction that reads and then writes fails at once with "database is locked"
    when another connection writes meanwhile, whatever the busy timeout (SQLite
    cannot upgrade its read lock then). PostgreSQL begins as usual.
    """
    conn = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    with conn, conn.begin():
        yield conn
