"""A real server killed mid-stream, and a real server under concurrent overlapping writers.

These drive ``plumbwatch serve`` as a subprocess (tests/live.py) because the
promises under test belong to the process, not to the app object: an answer
only after COMMIT, a batch all or nothing, a restart that recovers the file.
"""

from __future__ import annotations

import threading
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import pytest
import sqlalchemy as sa

from plumbwatch.store import keys
from plumbwatch.store.engine import create_engine
from plumbwatch.store.tables import (
    monitored_models,
    outcomes,
    predictions,
    row_keys,
    row_keys_recent,
)
from tests import live

# Every wait below is bounded itself; this is the backstop.
pytestmark = pytest.mark.timeout(180)

MODEL = "crash"
HTTP_TIMEOUT = httpx.Timeout(30.0, connect=5.0)


@dataclass
class Batch:
    kind: str  # "p" or "o"
    ids: list[str]
    status: int | None = None  # None: no answer (connection dropped by the kill)

    @property
    def acknowledged(self) -> bool:
        return self.status is not None and 200 <= self.status < 300


@dataclass
class Ledger:
    """Every batch a client sent, recorded before it is sent."""

    batches: list[Batch] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def record(self, batch: Batch) -> Batch:
        with self.lock:
            self.batches.append(batch)
        return batch

    def acked(self, kind: str) -> int:
        return sum(len(b.ids) for b in self.batches if b.kind == kind and b.acknowledged)


def prediction_rows(ids: list[str]) -> list[dict[str, object]]:
    # Content is a function of the id, so a retried batch is a pure duplicate.
    return [
        {
            "id": i,
            "predicted_at": "2026-01-10T08:00:00Z",
            "probability": (zlib.crc32(i.encode()) % 1000) / 1000,
            "version": "v1",
            "segments": {"region": "coast" if len(i) % 2 else "inland"},
        }
        for i in ids
    ]


def outcome_rows(ids: list[str]) -> list[dict[str, object]]:
    return [{"id": i, "outcome": len(i) % 2, "observed_at": "2026-01-12T08:00:00Z"} for i in ids]


def stored_ids(url: str, table: sa.Table) -> dict[str, int]:
    """client_id -> how many rows hold it, read straight from the database."""
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            rows = conn.execute(
                sa.select(table.c.client_id, sa.func.count())
                .join(monitored_models, monitored_models.c.id == table.c.model_id)
                .where(monitored_models.c.name == MODEL)
                .group_by(table.c.client_id)
            )
            return {cid: n for cid, n in rows}
    finally:
        engine.dispose()


def keys_consistent(url: str) -> None:
    """Each stored row has exactly one key entry, under its own hash, in one tier."""
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            entries: dict[tuple[str, int], list[int]] = {}
            for table in (row_keys, row_keys_recent):
                for kind, h, rid in conn.execute(
                    sa.select(table.c.kind, table.c.id_hash, table.c.row_id)
                ):
                    entries.setdefault((kind, rid), []).append(h)
            for kind, table in (("p", predictions), ("o", outcomes)):
                for rid, cid in conn.execute(sa.select(table.c.id, table.c.client_id)):
                    assert entries.pop((kind, rid), None) == [keys.id_hash(cid)], (kind, cid)
            assert entries == {}, f"key entries without rows: {list(entries)[:5]}"
    finally:
        engine.dispose()


def client_loop(
    server_url: str,
    token: str,
    ledger: Ledger,
    worker: int,
    stop: threading.Event,
    batch_size: int,
) -> None:
    """Post prediction batches, and outcome batches for what was acknowledged, until
    the connection fails (the kill) or stop is set."""
    headers = {"Authorization": f"Bearer {token}"}
    with httpx.Client(base_url=server_url, headers=headers, timeout=HTTP_TIMEOUT) as http:
        n = 0
        while not stop.is_set():
            ids = [f"w{worker}-b{n}-{k}" for k in range(batch_size)]
            send: list[tuple[Batch, str, dict[str, object]]] = [
                (Batch("p", ids), "predictions", {"predictions": prediction_rows(ids)})
            ]
            if n % 2 == 1:  # outcomes for the previous batch (or arriving before it)
                prev = [f"w{worker}-b{n - 1}-{k}" for k in range(batch_size)]
                send.append((Batch("o", prev), "outcomes", {"outcomes": outcome_rows(prev)}))
            for batch, path, body in send:
                ledger.record(batch)
                try:
                    r = http.post(f"/v1/models/{MODEL}/{path}", json=body)
                except httpx.TransportError:
                    return  # the server is gone: this batch stays unanswered
                batch.status = r.status_code
                if r.status_code != 200:
                    return  # checked by the test: every answer must be 200
            n += 1


def run_clients(
    target: Callable[[int, threading.Event], None], workers: int, stop: threading.Event
) -> list[threading.Thread]:
    threads = [threading.Thread(target=target, args=(w, stop), daemon=True) for w in range(workers)]
    for t in threads:
        t.start()
    return threads


def test_kill_mid_stream_keeps_every_acknowledged_batch_once(
    database_url: str, tmp_path: Path
) -> None:
    # The durability promise: a 2xx means committed; a crash at any moment leaves each
    # batch whole or absent; a restart recovers, and retries are duplicates.
    token = live.migrate_and_token(database_url)
    ledger = Ledger()
    log = tmp_path / "server.log"
    with live.served(database_url, log) as server:
        live.declare_binary_model(server.url, token, MODEL)
        stop = threading.Event()
        threads = run_clients(
            lambda w, s: client_loop(server.url, token, ledger, w, s, batch_size=250), 4, stop
        )
        deadline = time.monotonic() + 30
        # Kill once a good share is in, while every client has a request in flight.
        while ledger.acked("p") < 6_000 and time.monotonic() < deadline:
            time.sleep(0.01)
        server.kill()
        stop.set()
        for t in threads:
            t.join(timeout=40)
            assert not t.is_alive(), "a client hung after the kill"
    assert ledger.acked("p") >= 6_000, "the server was too slow to reach the kill point"
    assert {b.status for b in ledger.batches} <= {None, 200}

    # Restart on the same database: recovery (WAL replay / PostgreSQL) must succeed.
    with live.served(database_url, log) as server:
        for kind, table in (("p", predictions), ("o", outcomes)):
            counts = stored_ids(database_url, table)
            assert all(n == 1 for n in counts.values()), "an id is stored twice"
            for b in (b for b in ledger.batches if b.kind == kind):
                present = sum(1 for i in b.ids if i in counts)
                if b.acknowledged:
                    assert present == len(b.ids), f"acknowledged {kind} batch lost rows"
                else:
                    assert present in (0, len(b.ids)), f"half-stored {kind} batch: {present}"
        keys_consistent(database_url)

        # A client retrying its unanswered batches gets them stored exactly once.
        headers = {"Authorization": f"Bearer {token}"}
        with httpx.Client(base_url=server.url, headers=headers, timeout=HTTP_TIMEOUT) as http:
            for b in ledger.batches:
                if b.acknowledged:
                    continue
                if b.kind == "p":
                    r = http.post(
                        f"/v1/models/{MODEL}/predictions",
                        json={"predictions": prediction_rows(b.ids)},
                    )
                else:
                    r = http.post(
                        f"/v1/models/{MODEL}/outcomes", json={"outcomes": outcome_rows(b.ids)}
                    )
                assert r.status_code == 200, r.text
                assert r.json()["accepted"] + r.json()["duplicates"] == len(b.ids)
        sent = {i for b in ledger.batches if b.kind == "p" for i in b.ids}
        assert stored_ids(database_url, predictions) == dict.fromkeys(sent, 1)
        keys_consistent(database_url)


def test_concurrent_overlapping_batches(database_url: str, tmp_path: Path) -> None:
    # Eight writers at once, a third of each batch shared with another writer: the group
    # writer must neither deadlock nor fail a batch, and "duplicate" must be decided once
    # per id however the batches interleave.
    token = live.migrate_and_token(database_url)
    workers, batches, size = 8, 6, 300
    answers: list[dict[str, int]] = []
    failures: list[str] = []
    sent: set[str] = set()
    gate = threading.Barrier(workers, timeout=30)
    lock = threading.Lock()

    def ids_for(w: int, b: int) -> list[str]:
        own = [f"own-{w}-{b}-{k}" for k in range(size * 2 // 3)]
        # Shared with the neighbouring writer's batch of the same round.
        shared = [f"shared-{(w // 2)}-{b}-{k}" for k in range(size - len(own))]
        return own + shared

    def writer(w: int, _stop: threading.Event) -> None:
        headers = {"Authorization": f"Bearer {token}"}
        with httpx.Client(base_url=server.url, headers=headers, timeout=HTTP_TIMEOUT) as http:
            gate.wait()
            for b in range(batches):
                ids = ids_for(w, b)
                with lock:
                    sent.update(ids)
                try:
                    r = http.post(
                        f"/v1/models/{MODEL}/predictions",
                        json={"predictions": prediction_rows(ids)},
                    )
                except httpx.HTTPError as exc:
                    failures.append(repr(exc))
                    return
                if r.status_code != 200:
                    failures.append(f"{r.status_code}: {r.text[:200]}")
                    return
                with lock:
                    answers.append(r.json())

    with live.served(database_url, tmp_path / "server.log") as server:
        live.declare_binary_model(server.url, token, MODEL)
        threads = run_clients(writer, workers, threading.Event())
        for t in threads:
            t.join(timeout=90)
            assert not t.is_alive(), "a writer hung: deadlock or stalled group"
        assert failures == []
        assert len(answers) == workers * batches
        assert all(a["accepted"] + a["duplicates"] == size for a in answers)
        assert sum(a["accepted"] for a in answers) == len(sent)
        assert stored_ids(database_url, predictions) == dict.fromkeys(sent, 1)
        keys_consistent(database_url)
