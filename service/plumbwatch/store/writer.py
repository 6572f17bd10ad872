"""Group commit: one writer thread applies queued batches in shared transactions.

Several requests arriving together are applied in one transaction, each inside
its own savepoint: a batch that fails (a conflict, say) rolls back alone and
its request gets the error, while the others commit. A request is answered
only after the COMMIT returned, so every acknowledged batch is durable
(SQLite ``synchronous=FULL``; PostgreSQL's default ``synchronous_commit``).

One commit per group instead of one per request is what lets ingestion keep
up with several pipelines on one disk: the per-commit fsync and the index
pages a commit rewrites are shared by every batch in the group.

The writer keeps one connection for its whole life. On SQLite each connection
has its own page cache, emptied whenever another connection has written since
its last transaction; a pooled connection would meet the key index cold after
every group, and read about one page per looked-up id from the OS.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.errors import PlumbwatchError
from plumbwatch.store import keys
from plumbwatch.store.engine import BEGIN_OPTION

log = logging.getLogger(__name__)

Work = Callable[[sa.Connection], Any]


@dataclass
class _Job:
    work: Work
    rows: int
    future: Future[Any] = field(default_factory=Future)


class WriterStopped(PlumbwatchError):
    code = "unavailable"
    status = 503


class GroupWriter:
    """Runs write work in grouped transactions on a dedicated thread."""

    def __init__(
        self,
        engine: Engine,
        *,
        max_group_rows: int = 50_000,
        max_group_jobs: int = 64,
        settle_threshold: int = 100_000,
        retries: int = 5,
    ) -> None:
        self._engine = engine
        self._queue: queue.Queue[_Job | None] = queue.Queue()
        self._max_rows = max_group_rows
        self._max_jobs = max_group_jobs
        self._settle_threshold = settle_threshold
        self._retries = retries
        self._recent_keys: int | None = None
        self._commits = 0
        self._thread: threading.Thread | None = None
        self._stopping = False
        self._conn: sa.Connection | None = None  # used by the writer thread only

    def start(self) -> None:
        if self._thread is None:
            self._stopping = False
            self._thread = threading.Thread(target=self._run, name="plumbwatch-writer", daemon=True)
            self._thread.start()

    def stop(self) -> None:
        """Finish what is queued, then stop the thread."""
        if self._thread is not None:
            self._stopping = True
            self._queue.put(None)
            self._thread.join()
            self._thread = None

    def submit(self, work: Work, *, rows: int) -> Future[Any]:
        if self._thread is None or self._stopping:
            raise WriterStopped("the server is shutting down; retry the request")
        job = _Job(work, rows)
        self._queue.put(job)
        return job.future

    def _take_group(self, first: _Job) -> list[_Job]:
        group, rows = [first], first.rows
        while len(group) < self._max_jobs and rows < self._max_rows:
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                break
            if job is None:
                self._queue.put(None)  # keep the stop marker for the loop
                break
            group.append(job)
            rows += job.rows
        return group

    def _run(self) -> None:
        try:
            while True:
                first = self._queue.get()
                if first is None:
                    return
                group = self._take_group(first)
                self._apply(group)
                self._maybe_settle()
        finally:
            self._drop_connection()

    def _connection(self) -> sa.Connection:
        if self._conn is None:
            conn = self._engine.connect()
            self._conn = conn.execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
        return self._conn

    def _drop_connection(self) -> None:
        """Forget the connection after a failure (it may be broken) or at stop."""
        if self._conn is not None:
            try:
                self._conn.invalidate()
                self._conn.close()
            except sa.exc.SQLAlchemyError as exc:
                log.warning("closing the writer's connection failed: %s", exc)
            self._conn = None

    def _apply(self, group: list[_Job]) -> None:
        for attempt in range(self._retries + 1):
            results: list[tuple[_Job, Any, BaseException | None]] = []
            try:
                conn = self._connection()
                with conn.begin():
                    for job in group:
                        savepoint = conn.begin_nested()
                        try:
                            value = job.work(conn)
                        except Exception as exc:  # the batch fails alone
                            savepoint.rollback()
                            results.append((job, None, exc))
                        else:
                            savepoint.commit()
                            results.append((job, value, None))
            except sa.exc.OperationalError as exc:
                # Locked or busy database, dropped connection: nothing was committed,
                # so the whole group is safe to retry (on a fresh connection).
                self._drop_connection()
                if attempt < self._retries:
                    log.warning("write group failed (%s); retrying", exc.orig)
                    time.sleep(min(0.05 * 2**attempt, 1.0))
                    continue
                self._fail(group, exc)
                return
            except Exception as exc:
                self._drop_connection()
                self._fail(group, exc)
                return
            self._commits += 1
            for job, value, error in results:
                if error is None:
                    job.future.set_result(value)
                else:
                    job.future.set_exception(error)
            if self._recent_keys is not None:
                self._recent_keys += sum(job.rows for job, _, error in results if error is None)
            return

    @staticmethod
    def _fail(group: list[_Job], exc: BaseException) -> None:
        log.error("write group failed, nothing stored: %s", exc)
        for job in group:
            job.future.set_exception(exc)

    def _maybe_settle(self) -> None:
        """Move the recent key tier into the settled one once it has grown."""
        if not keys.uses_recent_tier(self._engine.dialect.name):
            return
        try:
            conn = self._connection()
            if self._recent_keys is None or self._commits % 100 == 0:
                with conn.begin():
                    self._recent_keys = keys.recent_count(conn)
            if self._recent_keys < self._settle_threshold:
                return
            started = time.perf_counter()
            with conn.begin():
                moved = keys.settle(conn)
        except sa.exc.SQLAlchemyError as exc:
            # Ingest goes on without settling (lookups read both tiers); a dead writer
            # thread would leave every later request waiting.
            self._drop_connection()
            log.warning("settling row keys failed, will retry later: %s", exc)
            return
        self._recent_keys = 0
        log.info("settled %d row keys in %.2f s", moved, time.perf_counter() - started)
