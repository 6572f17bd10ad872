"""Write transactions on SQLite take the write lock up front (store.engine.writing)."""

from __future__ import annotations

import threading
from contextlib import AbstractContextManager
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy.exc import OperationalError

from plumbwatch.store.engine import BEGIN_OPTION, create_engine, writing


def _read_then_write(ctx: AbstractContextManager[sa.Connection]) -> None:
    with ctx as conn:
        n = conn.exec_driver_sql("SELECT n FROM t").scalar_one()
        conn.exec_driver_sql("UPDATE t SET n = ?", (n + 10,))


def _race(tmp_path: Path, deferred: bool) -> int:
    # Another connection writes and commits while ours reads, then writes: the lost
    # update and lock-upgrade case of SQLite's documentation ("BEGIN TRANSACTION").
    engine = create_engine(f"sqlite:///{tmp_path / 'w.db'}", busy_timeout_ms=5_000)
    with engine.begin() as conn:
        conn.exec_driver_sql("CREATE TABLE t (n INTEGER)")
        conn.exec_driver_sql("INSERT INTO t VALUES (0)")
    other = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    tx = other.begin()
    other.exec_driver_sql("UPDATE t SET n = n + 1")
    timer = threading.Timer(0.3, tx.commit)
    timer.start()
    try:
        _read_then_write(engine.begin() if deferred else writing(engine))
    finally:
        timer.join()
        other.close()
    with engine.connect() as conn:
        n = int(conn.exec_driver_sql("SELECT n FROM t").scalar_one())
    engine.dispose()
    return n


def test_writing_waits_for_the_other_writer_and_keeps_its_update(tmp_path: Path) -> None:
    assert _race(tmp_path, deferred=False) == 11


def test_a_deferred_read_then_write_fails_meanwhile(tmp_path: Path) -> None:
    # Why `writing` exists: the plain transaction cannot upgrade its stale read lock.
    with pytest.raises(OperationalError, match="locked"):
        _race(tmp_path, deferred=True)
