"""The group writer's own connection: kept across groups, replaced when it breaks."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.store.writer import GroupWriter


def _session_id(conn: sa.Connection) -> object:
    if conn.dialect.name == "postgresql":
        return conn.exec_driver_sql("SELECT pg_backend_pid()").scalar_one()
    return id(conn.connection.dbapi_connection)


def test_groups_share_one_connection(engine: Engine) -> None:
    # One long-lived connection keeps SQLite's page cache warm between groups.
    writer = GroupWriter(engine)
    writer.start()
    try:
        first = writer.submit(_session_id, rows=0).result(timeout=30)
        second = writer.submit(_session_id, rows=0).result(timeout=30)
    finally:
        writer.stop()
    assert first == second


def test_a_dropped_connection_is_replaced_and_the_group_retried(engine: Engine) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("a SQLite connection is a file handle of this process: nothing drops it")
    writer = GroupWriter(engine)
    writer.start()
    try:
        pid = writer.submit(_session_id, rows=0).result(timeout=30)
        with engine.connect() as admin:
            admin.exec_driver_sql("SELECT pg_terminate_backend(%s)", (pid,))
        # The next group meets the dead session, reconnects and is applied: no error.
        again = writer.submit(_session_id, rows=0).result(timeout=30)
    finally:
        writer.stop()
    assert again != pid
