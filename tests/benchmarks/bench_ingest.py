"""Ingest throughput report: the real HTTP server against the bare database driver.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_ingest.py [--engine sqlite|postgresql|both]
        [--preload N] [--rows R] [--outcome-rows R]

Per engine: a fresh database is migrated through the CLI and preloaded with N
predictions of one model (default 1,000,000; random UUID ids) by calling
``store.ingest.write_predictions`` in 50,000-row transactions with the server
stopped, settling the key tier as the server would. Then ``plumbwatch serve``
runs as a subprocess and 4 client threads post R new predictions (random
UUIDs; predicted_at rising over the last minute, within a second of jitter, as
a live pipeline sends them; 1,000 per batch) and outcomes for R of the preloaded ids.
The bare-driver line writes the same new rows into a comparable table already
holding N rows, in 1,000-row transactions: sqlite3 ``executemany`` into a table
with a UNIQUE (model, client id) index (WAL, synchronous=FULL), or psycopg COPY
into a table with the same unique index. Peak server RSS is VmHWM from
``/proc/<pid>/status``. This is a report, not a test: it asserts nothing.

Request bodies are JSON-encoded before the clock starts, as a pipeline can encode
the next batch while one is in flight; on this 2-core machine the clients' own
encoding would otherwise compete with the server for CPU. CPU seconds of the server
process (all threads, ``/proc/<pid>/stat``) and of the client threads are reported
per 1,000 rows, with the load average before and after: other work on a shared
machine lowers the absolute rates, the ratio to the bare driver less so.
"""

from __future__ import annotations

import argparse
import os
import queue
import random
import shutil
import sqlite3
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import orjson
import sqlalchemy as sa

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from plumbwatch.declarations import ModelDeclaration  # noqa: E402
from plumbwatch.store import keys  # noqa: E402
from plumbwatch.store import models as store_models  # noqa: E402
from plumbwatch.store.engine import BEGIN_OPTION, create_engine  # noqa: E402
from plumbwatch.store.ingest import write_predictions  # noqa: E402
from plumbwatch.timefmt import format_instant, to_micros  # noqa: E402
from plumbwatch.validation import PredictionRow  # noqa: E402
from tests import live  # noqa: E402

MODEL = "bench"
BATCH = 1_000
CLIENTS = 4
PRELOAD_TX = 50_000
REGIONS = ("north", "south", "east", "west", "coast")
DEFAULT_PG = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


@dataclass
class Row:
    client_id: str
    predicted_at_us: int
    probability: float
    region: str


def make_rows(rng: random.Random, n: int, end_us: int, spread_us: int) -> list[Row]:
    """Random UUID ids; predicted_at rising from end_us - spread_us to end_us, with up to
    a second of jitter, the order in which a live pipeline scores and sends rows."""
    step = spread_us / max(n, 1)
    return [
        Row(
            str(uuid.UUID(int=rng.getrandbits(128), version=4)),
            end_us - spread_us + int(k * step) - rng.randrange(1_000_000),
            rng.random(),
            rng.choice(REGIONS),
        )
        for k in range(n)
    ]


def chunks(seq: Sequence[Row], size: int) -> Iterator[Sequence[Row]]:
    for start in range(0, len(seq), size):
        yield seq[start : start + size]


# ---- preload through the store -------------------------------------------------------


def preload(url: str, rows: Sequence[Row], now_us: int) -> float:
    engine = create_engine(url)
    decl = ModelDeclaration.model_validate(
        {"kind": "binary", "label_horizon": "P5D", "segment_keys": ["region"]}
    )
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name=MODEL, declaration=decl, now_us=now_us)
    started = time.perf_counter()
    for n, part in enumerate(chunks(rows, PRELOAD_TX)):
        if n == 1 and engine.dialect.name == "postgresql":
            with engine.begin() as conn:
                conn.exec_driver_sql("ANALYZE")
        batch = [
            PredictionRow(
                i,
                r.client_id,
                r.predicted_at_us,
                r.probability,
                None,
                "v1",
                orjson.dumps({"region": r.region}).decode(),
            )
            for i, r in enumerate(part)
        ]
        with engine.connect() as c:
            conn = c.execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
            with conn.begin():
                write_predictions(conn, model_id=model.id, rows=batch, now_us=now_us)
                if keys.recent_count(conn) >= 200_000:
                    keys.settle(conn)
                    if engine.dialect.name == "postgresql":
                        # Fresh statistics, or the planner scans whole tables per lookup.
                        conn.exec_driver_sql("ANALYZE")
    with engine.begin() as conn:
        keys.settle(conn)
    if engine.dialect.name == "postgresql":
        with engine.connect() as c:
            c = c.execution_options(isolation_level="AUTOCOMMIT")
            c.exec_driver_sql("VACUUM ANALYZE")
    engine.dispose()
    return time.perf_counter() - started


# ---- HTTP clients ---------------------------------------------------------------------


def prediction_bodies(rows: Sequence[Row]) -> list[bytes]:
    return [
        orjson.dumps(
            {
                "predictions": [
                    {
                        "id": r.client_id,
                        "predicted_at": format_instant(r.predicted_at_us),
                        "probability": r.probability,
                        "version": "v1",
                        "segments": {"region": r.region},
                    }
                    for r in part
                ]
            }
        )
        for part in chunks(rows, BATCH)
    ]


def outcome_bodies(rows: Sequence[Row], rng: random.Random) -> list[bytes]:
    return [
        orjson.dumps(
            {
                "outcomes": [
                    {
                        "id": r.client_id,
                        "outcome": int(rng.random() < r.probability),
                        "observed_at": format_instant(r.predicted_at_us + 3_600_000_000),
                    }
                    for r in part
                ]
            }
        )
        for part in chunks(rows, BATCH)
    ]


@dataclass
class Phase:
    """One HTTP phase: wall seconds, and CPU seconds of the server and of the clients."""

    rows: int
    wall_s: float
    server_cpu_s: float
    client_cpu_s: float

    @property
    def rate(self) -> float:
        return self.rows / self.wall_s

    def per_1000(self, cpu_s: float) -> float:
        """CPU milliseconds per 1,000 rows."""
        return cpu_s * 1e6 / self.rows


def cpu_seconds(pid: int) -> float:
    """User plus system CPU seconds of a process, all threads (``/proc/<pid>/stat``)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def timed_post(server: live.Server, token: str, path: str, bodies: list[bytes]) -> Phase:
    server_before, client_before = cpu_seconds(server.pid), time.process_time()
    wall = post_all(server.url, token, path, bodies, BATCH)
    return Phase(
        rows=len(bodies) * BATCH,
        wall_s=wall,
        server_cpu_s=cpu_seconds(server.pid) - server_before,
        client_cpu_s=time.process_time() - client_before,
    )


def post_all(url: str, token: str, path: str, bodies: list[bytes], expect: int) -> float:
    """Post every body from CLIENTS threads; returns wall seconds. Raises on any failure."""
    work: queue.Queue[bytes] = queue.Queue()
    for b in bodies:
        work.put(b)
    errors: list[str] = []
    headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}
    start_gate = threading.Barrier(CLIENTS + 1)

    def client() -> None:
        with httpx.Client(base_url=url, headers=headers, timeout=120) as http:
            start_gate.wait()
            while True:
                try:
                    body = work.get_nowait()
                except queue.Empty:
                    return
                r = http.post(path, content=body)
                if r.status_code != 200 or r.json()["accepted"] != expect:
                    errors.append(f"{r.status_code} {r.text[:300]}")
                    return

    threads = [threading.Thread(target=client) for _ in range(CLIENTS)]
    for t in threads:
        t.start()
    start_gate.wait()
    started = time.perf_counter()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - started
    if errors:
        raise RuntimeError(f"ingest failed: {errors[0]}")
    return elapsed


def peak_rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


# ---- bare drivers ---------------------------------------------------------------------

BARE_SQLITE = """CREATE TABLE bare_predictions (
    id INTEGER PRIMARY KEY, model_id INTEGER NOT NULL, client_id TEXT NOT NULL,
    predicted_at_us INTEGER NOT NULL, probability REAL, version TEXT NOT NULL,
    segments TEXT, received_at_us INTEGER NOT NULL, UNIQUE (model_id, client_id))"""


def _tuples(rows: Sequence[Row], now_us: int) -> list[tuple[object, ...]]:
    return [
        (
            1,
            r.client_id,
            r.predicted_at_us,
            r.probability,
            "v1",
            f'{{"region":"{r.region}"}}',
            now_us,
        )
        for r in rows
    ]


def bare_sqlite(path: Path, preload_rows: Sequence[Row], rows: Sequence[Row], now_us: int) -> float:
    db = sqlite3.connect(path, isolation_level=None)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("PRAGMA synchronous=FULL")
    db.execute(BARE_SQLITE)
    insert = (
        "INSERT INTO bare_predictions (model_id, client_id, predicted_at_us, probability, "
        "version, segments, received_at_us) VALUES (?, ?, ?, ?, ?, ?, ?)"
    )
    for part in chunks(preload_rows, 100_000):
        db.execute("BEGIN")
        db.executemany(insert, _tuples(part, now_us))
        db.execute("COMMIT")
    db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    params = [_tuples(part, now_us) for part in chunks(rows, BATCH)]
    started = time.perf_counter()
    for p in params:
        db.execute("BEGIN")
        db.executemany(insert, p)
        db.execute("COMMIT")
    elapsed = time.perf_counter() - started
    db.close()
    return elapsed


def bare_copy(
    pg_url: str, schema: str, preload_rows: Sequence[Row], rows: Sequence[Row], now_us: int
) -> float:
    import psycopg

    dsn = sa.engine.make_url(pg_url).set(drivername="postgresql")
    conninfo = dsn.render_as_string(hide_password=False)
    columns = "model_id, client_id, predicted_at_us, probability, version, segments, received_at_us"
    with psycopg.connect(conninfo, options=f"-csearch_path={schema}") as db:
        db.execute(
            "CREATE TABLE bare_predictions (id BIGSERIAL PRIMARY KEY, model_id INTEGER NOT NULL,"
            " client_id VARCHAR(200) NOT NULL, predicted_at_us BIGINT NOT NULL,"
            " probability DOUBLE PRECISION, version VARCHAR(64) NOT NULL, segments TEXT,"
            " received_at_us BIGINT NOT NULL, UNIQUE (model_id, client_id))"
        )
        db.commit()
        for part in chunks(preload_rows, 100_000):
            with db.cursor().copy(f"COPY bare_predictions ({columns}) FROM STDIN") as copy:
                for t in _tuples(part, now_us):
                    copy.write_row(t)
            db.commit()
        db.execute("ANALYZE bare_predictions")
        db.commit()
        params = [_tuples(part, now_us) for part in chunks(rows, BATCH)]
        started = time.perf_counter()
        for p in params:
            with db.cursor().copy(f"COPY bare_predictions ({columns}) FROM STDIN") as copy:
                for t in p:
                    copy.write_row(t)
            db.commit()
        return time.perf_counter() - started


# ---- one engine -----------------------------------------------------------------------


@dataclass
class Result:
    engine: str
    predictions: Phase
    bare: float
    outcomes: Phase | None
    rss_mib: float
    preload_s: float


def run_engine(kind: str, args: argparse.Namespace, work: Path) -> Result:
    rng = random.Random(20260601)
    now_us = to_micros(datetime.now(UTC) - timedelta(minutes=1))
    print(f"[{kind}] generating {args.preload:,} + {args.rows:,} rows", flush=True)
    # History over the past ten days, then new rows over the last minute: ids random,
    # times rising as a live pipeline sends them.
    preload_rows = make_rows(rng, args.preload, now_us - 60_000_000, 10 * 86_400_000_000)
    new_rows = make_rows(rng, args.rows, now_us, 60_000_000)
    schema = None
    if kind == "sqlite":
        url = f"sqlite:///{work / 'plumbwatch.db'}"
    else:
        schema = f"bench_{uuid.uuid4().hex[:10]}"
        admin = sa.create_engine(args.pg_url)
        with admin.begin() as conn:
            conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
        url = (
            sa.engine.make_url(args.pg_url)
            .update_query_dict({"options": f"-csearch_path={schema}"})
            .render_as_string(hide_password=False)
        )
    try:
        token = live.migrate_and_token(url, name="bench-admin")
        print(f"[{kind}] preloading {args.preload:,} predictions via write_predictions", flush=True)
        preload_s = preload(url, preload_rows, now_us) if args.preload else 0.0
        print(f"[{kind}] preloaded in {preload_s:.1f} s", flush=True)
        bodies = prediction_bodies(new_rows)
        out_bodies = (
            outcome_bodies(preload_rows[: args.outcome_rows], rng) if args.outcome_rows else []
        )
        with live.served(url, work / f"server-{kind}.log", extra_args=args.serve_args) as server:
            pred = timed_post(server, token, f"/v1/models/{MODEL}/predictions", bodies)
            rate = f"{pred.rate:,.0f}/s ({pred.wall_s:.1f} s)"
            print(f"[{kind}] HTTP predictions: {rate}", flush=True)
            outcomes = None
            if out_bodies:
                outcomes = timed_post(server, token, f"/v1/models/{MODEL}/outcomes", out_bodies)
                print(
                    f"[{kind}] HTTP outcomes: {outcomes.rate:,.0f}/s ({outcomes.wall_s:.1f} s)",
                    flush=True,
                )
            rss = peak_rss_mib(server.pid)
        print(f"[{kind}] bare driver: preloading and writing", flush=True)
        if kind == "sqlite":
            secs = bare_sqlite(work / "bare.db", preload_rows, new_rows, now_us)
        else:
            assert schema is not None
            secs = bare_copy(args.pg_url, schema, preload_rows, new_rows, now_us)
        bare = len(new_rows) / secs
        print(f"[{kind}] bare: {bare:,.0f}/s ({secs:.1f} s)", flush=True)
        return Result(kind, pred, bare, outcomes, rss, preload_s)
    finally:
        if schema is not None:
            with admin.begin() as conn:
                conn.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
            admin.dispose()


def report(results: list[Result], argv: list[str], load: tuple[str, str]) -> None:
    print()
    print("command: .venv/bin/python tests/benchmarks/bench_ingest.py " + " ".join(argv))
    print(f"load average (1, 5, 15 min) before: {load[0]}; after: {load[1]}")
    print(f"{'measure':52} {'value':>12} {'target':>12}")
    targets = {"sqlite": 40_000, "postgresql": 25_000}
    bare_name = {"sqlite": "bare sqlite3 executemany", "postgresql": "bare psycopg COPY"}

    def line(name: str, value: str, target: str = "") -> None:
        print(f"{name:52} {value:>12} {target:>12}")

    for r in results:
        e, p = r.engine, r.predictions
        line(f"HTTP {e} predictions/s", f"{p.rate:,.0f}", f">= {targets[e]:,}")
        line(f"{bare_name[e]} rows/s (1,000-row tx)", f"{r.bare:,.0f}")
        ratio_target = ">= 1.0x" if e == "sqlite" else ""
        line(f"ratio HTTP / bare ({e})", f"{p.rate / r.bare:.2f}x", ratio_target)
        line(f"server CPU ms per 1,000 predictions ({e})", f"{p.per_1000(p.server_cpu_s):.1f}")
        line(f"client CPU ms per 1,000 predictions ({e})", f"{p.per_1000(p.client_cpu_s):.1f}")
        if r.outcomes is not None:
            o = r.outcomes
            line(f"HTTP {e} outcomes/s", f"{o.rate:,.0f}", ">= 30,000" if e == "sqlite" else "")
            line(f"server CPU ms per 1,000 outcomes ({e})", f"{o.per_1000(o.server_cpu_s):.1f}")
            line(f"client CPU ms per 1,000 outcomes ({e})", f"{o.per_1000(o.client_cpu_s):.1f}")
        line(f"peak server RSS, MiB ({e})", f"{r.rss_mib:,.0f}", "< 300")
        line(f"preload seconds ({e}, not a target)", f"{r.preload_s:,.1f}")


def load_average() -> str:
    return ", ".join(f"{x:.2f}" for x in os.getloadavg())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--engine", choices=["sqlite", "postgresql", "both"], default="both")
    parser.add_argument("--preload", type=int, default=1_000_000)
    parser.add_argument("--rows", type=int, default=200_000, help="new predictions to post")
    parser.add_argument("--outcome-rows", type=int, default=200_000)
    parser.add_argument("--pg-url", default=DEFAULT_PG)
    parser.add_argument("--keep", action="store_true", help="keep the work directory")
    parser.add_argument("--serve-arg", dest="serve_args", action="append", default=[])
    args = parser.parse_args()
    kinds = ["sqlite", "postgresql"] if args.engine == "both" else [args.engine]
    work = Path(tempfile.mkdtemp(prefix="plumbwatch-bench-"))
    load_before = load_average()
    try:
        results = [run_engine(k, args, work) for k in kinds]
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    report(results, sys.argv[1:], (load_before, load_average()))


if __name__ == "__main__":
    main()
