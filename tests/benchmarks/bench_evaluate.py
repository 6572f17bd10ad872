"""Evaluation engine report: full recompute, rebuild, incremental runs, reads, sizes.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_evaluate.py [--engine sqlite|postgresql|both]
        [--rows N] [--repeat K] [--loader ingest|direct] [--profile DIR]

Per engine, in a fresh database (a SQLite file under a temporary directory, or a
fresh schema on PostgreSQL), migrated through ``plumbwatch migrate``:

1. One binary model with segment keys region (8 values), tier (3) and depot (90),
   no crosses (102 slices, slice cap 100), label horizon P3D, windows P7D and
   P28D. N predictions with random UUID ids, spread over 28 days and sent in time
   order, and their outcomes (about 2 % observed after the horizon, 1 % never
   labelled) are loaded in 100,000-row transactions (each chunk's predictions,
   then its outcomes), settling the key tier whenever it holds 1,000,000 keys and
   at the end. ``--loader ingest`` (default) writes through
   ``store.ingest.write_predictions`` and ``write_outcomes``, so rows and row keys
   are exactly those the API would store; ``--loader direct`` writes the same rows
   and keys with the store's bulk primitives (``keys.allocate_ids``,
   ``keys.insert_rows``, ``keys.add``) and skips the ingest path's look-ups of
   existing ids, several times faster for 10,000,000 rows. K x 10,000 of the
   predictions get no outcome yet.
2. The first evaluation (``jobs.tick.Evaluator``, as_of one second after every
   cohort matured) is the full recompute from raw rows: every metric of every
   slice and window from the raw rows, as a fresh deployment computes them; then
   ``evaluate.rebuild.rebuild_model``. Both run in a child process so that their
   peak RSS (VmHWM of ``/proc/self/status``) and CPU time are their own.
3. K times (``--repeat``, default 1): 10,000 of the withheld outcomes, drawn at
   random (so spread over all days and slices), are written through
   ``write_outcomes`` and the next evaluation (as_of one more hour later) is
   timed, also in a child process; the median wall and CPU seconds are reported
   with each run's load average (the machine is shared: compare CPU seconds).
4. ``plumbwatch serve`` runs as a subprocess; the median of 20 calls each of
   ``GET /status`` and ``GET /metrics`` for two ranges whose bounds fall inside
   days is reported.
5. Table sizes: ``dbstat`` on SQLite, ``pg_total_relation_size`` on PostgreSQL.
6. Evidence on/off (SQLite): before step 2 the database file is copied three times;
   one child process runs the first evaluation on the first copy with ``Options(
   evidence=False)`` (no evidence streams, drift, false-discovery control or advice)
   to warm imports and caches, untimed, then times it on the second copy (evidence
   off) and on the third (evidence on), wall and CPU; the withheld outcomes are
   written to all three and the incremental evaluations compared the same way. The
   CPU ratio of the two, measured in one process one after the other, is what the
   evidence work costs a run (CPU, because other work on the machine inflates wall
   times unevenly).

This is a report, not a test: it asserts nothing. ``--profile DIR`` writes a
cProfile of each child step there.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import sqlalchemy as sa

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from plumbwatch.declarations import ModelDeclaration  # noqa: E402
from plumbwatch.store import keys  # noqa: E402
from plumbwatch.store import models as store_models  # noqa: E402
from plumbwatch.store.engine import BEGIN_OPTION, create_engine  # noqa: E402
from plumbwatch.store.ingest import write_outcomes, write_predictions  # noqa: E402
from plumbwatch.store.tables import outcomes, predictions  # noqa: E402
from plumbwatch.timefmt import format_instant, parse_instant, to_micros  # noqa: E402
from plumbwatch.validation import OutcomeRow, PredictionRow  # noqa: E402
from tests import live  # noqa: E402

MODEL = "parcels"
DAYS = 28
HORIZON_DAYS = 3
DAY_US = 86_400 * 1_000_000
HOUR_US = 3_600 * 1_000_000
T0_US = to_micros(parse_instant("2026-03-02T00:00:00Z"))
WITHHELD = 10_000
LOAD_TX = 100_000
SETTLE_AT = 1_000_000
SLICE_CAP = 100
CALLS = 20
DEFAULT_PG = "postgresql+psycopg://postgres@127.0.0.1:5432/test"

REGIONS = ("north", "south", "east", "west", "coast", "highland", "valley", "harbour")
TIERS = ("express", "standard", "economy")
DEPOTS = tuple(f"depot-{i:02d}" for i in range(90))
# Canonical segment JSON (keys sorted) of every combination, indexed r, t, d.
SEGMENTS = [
    f'{{"depot":"{d}","region":"{r}","tier":"{t}"}}' for r in REGIONS for t in TIERS for d in DEPOTS
]
RAW_TABLES = ("predictions", "outcomes", "outcome_revisions", "row_keys", "row_keys_recent")
DERIVED_TABLES = (
    "sketches", "sketch_patches", "evaluations", "evaluation_cursors", "slice_values",
)  # fmt: skip


# ---- data -------------------------------------------------------------------------------


@dataclass
class Chunk:
    ids: list[str]
    predicted_at: np.ndarray
    probability: np.ndarray
    segment: np.ndarray
    outcome: np.ndarray
    observed_at: np.ndarray
    labelled: np.ndarray  # False: no outcome is sent in the load


def uuids(rng: np.random.Generator, n: int) -> list[str]:
    """Random version-4 UUID strings."""
    raw = rng.integers(0, 256, size=(n, 16), dtype=np.uint8)
    raw[:, 6] = (raw[:, 6] & 0x0F) | 0x40
    raw[:, 8] = (raw[:, 8] & 0x3F) | 0x80
    text = raw.tobytes().hex()
    return [
        f"{h[0:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:32]}"
        for h in (text[i : i + 32] for i in range(0, 32 * n, 32))
    ]


def make_chunk(seed: int, k: int, start: int, stop: int, total: int, withheld: set[int]) -> Chunk:
    """Rows start..stop of total, in time order over DAYS days (a pipeline sends them so)."""
    rng = np.random.default_rng([seed, k])
    n = stop - start
    span = DAYS * DAY_US
    base = (np.arange(start, stop, dtype=np.float64) / total * span).astype(np.int64)
    predicted = T0_US + base + rng.integers(0, 1_000_000, n)
    np.clip(predicted, T0_US, T0_US + span - 1, out=predicted)
    p = np.clip(rng.beta(2.0, 5.0, n), 1e-4, 1 - 1e-4)
    r = rng.integers(0, len(REGIONS), n)
    t = rng.integers(0, len(TIERS), n)
    d = rng.integers(0, len(DEPOTS), n)
    segment = (r * len(TIERS) + t) * len(DEPOTS) + d
    # Calibrated, except that the coast region's odds rise through the last fortnight.
    odds = np.where((r == REGIONS.index("coast")) & (base > span // 2), 1.6, 1.0)
    q = 1.0 / (1.0 + (1.0 - p) / (p * odds))
    y = (rng.random(n) < q).astype(np.int64)
    horizon = HORIZON_DAYS * DAY_US
    delay = rng.integers(HOUR_US, horizon, n)
    late = rng.random(n) < 0.02
    delay[late] = horizon + rng.integers(HOUR_US, 2 * DAY_US, int(late.sum()))
    labelled = rng.random(n) >= 0.01
    idx = np.arange(start, stop)
    labelled &= ~np.isin(idx, np.fromiter(withheld, np.int64)) if withheld else True
    return Chunk(uuids(rng, n), predicted, p, segment, y, predicted + delay, labelled)


def withheld_rows(total: int, seed: int, batches: int = 1) -> set[int]:
    rng = np.random.default_rng([seed, 999_999])
    size = min(WITHHELD * batches, total // 10)
    return set(rng.choice(total, size=size, replace=False).tolist())


def withheld_batches(kept: list[tuple[str, int, int]], seed: int, batches: int) -> list[list[Any]]:
    """The withheld outcomes in ``batches`` random batches (each spread over all days)."""
    order = np.random.default_rng([seed, 424_242]).permutation(len(kept))
    size = -(-len(kept) // batches)
    shuffled = [kept[i] for i in order]
    return [shuffled[i : i + size] for i in range(0, len(shuffled), size)]


# ---- database ---------------------------------------------------------------------------


def fresh_database(kind: str, work: Path, pg_url: str) -> tuple[str, str | None]:
    if kind == "sqlite":
        return f"sqlite:///{work / 'plumbwatch.db'}", None
    schema = f"bench_{uuid.uuid4().hex[:10]}"
    admin = sa.create_engine(pg_url)
    with admin.begin() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    admin.dispose()
    url = (
        sa.engine.make_url(pg_url)
        .update_query_dict({"options": f"-csearch_path={schema}"})
        .render_as_string(hide_password=False)
    )
    return url, schema


def drop_schema(pg_url: str, schema: str) -> None:
    admin = sa.create_engine(pg_url)
    with admin.begin() as conn:
        conn.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
    admin.dispose()


def declare(url: str, now_us: int) -> int:
    engine = create_engine(url)
    decl = ModelDeclaration.model_validate(
        {
            "kind": "binary",
            "label_horizon": f"P{HORIZON_DAYS}D",
            "segment_keys": ["region", "tier", "depot"],
            "windows": ["P7D", "P28D"],
            "description": "parcel arrives late",
        }
    )
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name=MODEL, declaration=decl, now_us=now_us)
    engine.dispose()
    return model.id


def write_tx(engine: sa.Engine) -> sa.Connection:
    return engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})


def load(
    url: str, model_id: int, total: int, seed: int, now_us: int, batches: int = 1
) -> dict[str, Any]:
    """Predictions and outcomes through the store's ingest functions; returns figures."""
    engine = create_engine(url)
    withheld = withheld_rows(total, seed, batches)
    kept: list[tuple[str, int, int]] = []  # withheld outcomes: id, outcome, observed_at
    started = time.perf_counter()
    n_out = 0
    for k, start in enumerate(range(0, total, LOAD_TX)):
        stop = min(start + LOAD_TX, total)
        c = make_chunk(seed, k, start, stop, total, withheld)
        preds = [
            PredictionRow(i, c.ids[i], int(c.predicted_at[i]), float(c.probability[i]), None,
                          "v1", SEGMENTS[c.segment[i]])
            for i in range(stop - start)
        ]  # fmt: skip
        outs = [
            OutcomeRow(int(i), c.ids[i], int(c.outcome[i]), int(c.observed_at[i]))
            for i in np.flatnonzero(c.labelled)
        ]
        for i in range(stop - start):
            if start + i in withheld:
                kept.append((c.ids[i], int(c.outcome[i]), int(c.observed_at[i])))
        with write_tx(engine) as conn, conn.begin():
            write_predictions(conn, model_id=model_id, rows=preds, now_us=now_us)
            write_outcomes(conn, model_id=model_id, rows=outs, now_us=now_us, correction=False)
            if keys.recent_count(conn) >= SETTLE_AT:
                keys.settle(conn)
        n_out += len(outs)
        if k % 10 == 9:
            rate = stop / (time.perf_counter() - started)
            print(f"    loaded {stop:,} predictions ({rate:,.0f}/s)", flush=True)
    with write_tx(engine) as conn, conn.begin():
        keys.settle(conn)
    seconds = time.perf_counter() - started
    analyse(engine)
    engine.dispose()
    return {"load_s": seconds, "outcomes": n_out, "withheld": kept}


PREDICTION_COLUMNS = (
    "id", "model_id", "client_id", "predicted_at_us", "probability", "probabilities",
    "version", "segments", "received_at_us",
)  # fmt: skip
OUTCOME_COLUMNS = (
    "id", "model_id", "client_id", "prediction_id", "outcome", "observed_at_us",
    "received_at_us", "revision",
)  # fmt: skip


def load_direct(
    url: str, model_id: int, total: int, seed: int, now_us: int, batches: int = 1
) -> dict[str, Any]:
    """The same rows and id keys as :func:`load`, written with the store's bulk
    primitives (``keys.allocate_ids``, ``keys.insert_rows``: COPY on PostgreSQL,
    ``keys.add``) but without the ingest path's per-batch look-ups of existing ids,
    which a fresh database with unique ids does not need. Several times faster for
    the 10-million-row runs."""
    engine = create_engine(url)
    withheld = withheld_rows(total, seed, batches)
    kept: list[tuple[str, int, int]] = []
    started = time.perf_counter()
    n_out = 0
    for k, start in enumerate(range(0, total, LOAD_TX)):
        stop = min(start + LOAD_TX, total)
        c = make_chunk(seed, k, start, stop, total, withheld)
        n = stop - start
        for i in range(n):
            if start + i in withheld:
                kept.append((c.ids[i], int(c.outcome[i]), int(c.observed_at[i])))
        labelled = np.flatnonzero(c.labelled).tolist()
        with write_tx(engine) as conn, conn.begin():
            keys.lock_model(conn, model_id)
            pids = keys.allocate_ids(conn, predictions, n)
            prediction_rows = [
                (pids[i], model_id, c.ids[i], int(c.predicted_at[i]),
                 float(c.probability[i]), None, "v1", SEGMENTS[c.segment[i]], now_us)
                for i in range(n)
            ]  # fmt: skip
            keys.insert_rows(conn, "predictions", PREDICTION_COLUMNS, prediction_rows)
            keys.add(
                conn,
                model_id=model_id,
                kind="p",
                pairs=((keys.id_hash(c.ids[i]), pids[i]) for i in range(n)),
            )
            oids = keys.allocate_ids(conn, outcomes, len(labelled))
            pairs = list(zip(oids, labelled, strict=True))
            outcome_rows = [
                (oid, model_id, c.ids[i], pids[i], int(c.outcome[i]),
                 int(c.observed_at[i]), now_us, 0)
                for oid, i in pairs
            ]  # fmt: skip
            keys.insert_rows(conn, "outcomes", OUTCOME_COLUMNS, outcome_rows)
            outcome_keys = [(keys.id_hash(c.ids[i]), o) for o, i in pairs]
            keys.add(conn, model_id=model_id, kind="o", pairs=outcome_keys)
            if keys.recent_count(conn) >= SETTLE_AT:
                keys.settle(conn)
        n_out += len(labelled)
        if k % 10 == 9:
            rate = stop / (time.perf_counter() - started)
            print(f"    loaded {stop:,} predictions ({rate:,.0f}/s)", flush=True)
    with write_tx(engine) as conn, conn.begin():
        keys.settle(conn)
    seconds = time.perf_counter() - started
    analyse(engine)
    engine.dispose()
    return {"load_s": seconds, "outcomes": n_out, "withheld": kept}


def analyse(engine: sa.Engine) -> None:
    with engine.connect() as c:
        if engine.dialect.name == "postgresql":
            c.execution_options(isolation_level="AUTOCOMMIT").exec_driver_sql("VACUUM ANALYZE")
        else:  # outside any transaction: the engine's begin hook would open one
            raw = c.connection.driver_connection
            assert raw is not None
            raw.execute("ANALYZE")
            raw.execute("PRAGMA wal_checkpoint(TRUNCATE)")


def post_withheld(url: str, model_id: int, rows: list[tuple[str, int, int]], now_us: int) -> float:
    engine = create_engine(url)
    started = time.perf_counter()
    for start in range(0, len(rows), 1_000):  # 1,000-row batches, as a labelling job sends
        batch = [OutcomeRow(i, *r) for i, r in enumerate(rows[start : start + 1_000])]
        with write_tx(engine) as conn, conn.begin():
            write_outcomes(conn, model_id=model_id, rows=batch, now_us=now_us, correction=False)
    seconds = time.perf_counter() - started
    engine.dispose()
    return seconds


def table_sizes(url: str) -> dict[str, int]:
    """Bytes per table, indexes included."""
    engine = create_engine(url)
    out: dict[str, int] = {}
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            listed = conn.exec_driver_sql("SELECT name, tbl_name FROM sqlite_master")
            owner: dict[str, str] = {str(name): str(table) for name, table in listed}
            for name, size in conn.exec_driver_sql(
                "SELECT name, SUM(pgsize) FROM dbstat GROUP BY name"
            ):
                table = owner.get(name, name)
                out[table] = out.get(table, 0) + int(size)
        else:
            for name in (*RAW_TABLES, *DERIVED_TABLES):
                out[name] = int(
                    conn.exec_driver_sql(f"SELECT pg_total_relation_size('{name}')").scalar_one()
                )
    engine.dispose()
    return out


# ---- child steps (own process: own peak RSS) ----------------------------------------------


def vm_hwm_mib() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def child(args: argparse.Namespace) -> None:
    from plumbwatch.evaluate.rebuild import rebuild_model
    from plumbwatch.evaluate.run import Options
    from plumbwatch.jobs.tick import Evaluator, holder_name

    engine = create_engine(args.url)
    with engine.connect() as conn:
        model = store_models.get_or_raise(conn=conn, name=MODEL)
    base = vm_hwm_mib()
    profiler = None
    if args.profile_to:
        import cProfile

        profiler = cProfile.Profile()
        profiler.enable()
    started = time.perf_counter()
    cpu_started = time.process_time()
    if args.child == "evaluate":
        evaluator = Evaluator(engine, holder_name(), Options(slice_cap=SLICE_CAP))
        record = evaluator.evaluate(model, as_of_us=args.as_of_us, now_us=args.now_us)
        rows = record["rows_applied"]
        extra = {"health": record["health"], "slices": len(record["windows"][-1]["slices"])}
    else:
        rows = rebuild_model(engine, model, now_us=args.now_us, slice_cap=SLICE_CAP)
        extra = {}
    seconds = time.perf_counter() - started
    cpu_seconds = time.process_time() - cpu_started
    if profiler is not None:
        profiler.disable()
        profiler.dump_stats(args.profile_to)
    engine.dispose()
    result = {
        "seconds": seconds,
        "cpu_seconds": cpu_seconds,
        "rows": rows,
        "rss_mib": vm_hwm_mib(),
        "base_mib": base,
    }
    print(json.dumps({**result, **extra}))


def pair(args: argparse.Namespace) -> None:
    """Warm up on ``url_warm`` (evidence off), then evaluate ``url`` with evidence off and
    ``url_on`` with it on, in this process."""
    from plumbwatch.evaluate.run import Options, evaluate_model

    out = {}
    runs = (("warm", args.url_warm, False), ("off", args.url, False), ("on", args.url_on, True))
    for label, url, evidence in runs:
        engine = create_engine(url)
        with engine.connect() as conn:
            model = store_models.get_or_raise(conn=conn, name=MODEL)
        wall, cpu = time.perf_counter(), time.process_time()
        evaluate_model(
            engine,
            model,
            as_of_us=args.as_of_us,
            now_us=args.now_us,
            options=Options(slice_cap=SLICE_CAP, evidence=evidence),
        )
        out[label] = {"seconds": time.perf_counter() - wall, "cpu": time.process_time() - cpu}
        engine.dispose()
    print(json.dumps(out))


def run_pair(url_warm: str, url_off: str, url_on: str, *, as_of_us: int, now_us: int) -> dict:
    cmd = [sys.executable, __file__, "--child", "pair", "--url", url_off, "--url-on", url_on]
    cmd += ["--url-warm", url_warm]
    cmd += ["--as-of-us", str(as_of_us), "--now-us", str(now_us)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"pair failed:\n{done.stderr}")
    return dict(json.loads(done.stdout.strip().splitlines()[-1]))


def run_child(url: str, step: str, *, as_of_us: int, now_us: int, profile: Path | None) -> dict:
    cmd = [sys.executable, __file__, "--child", step, "--url", url]
    cmd += ["--as-of-us", str(as_of_us), "--now-us", str(now_us)]
    if profile is not None:
        cmd += ["--profile-to", str(profile)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"{step} failed:\n{done.stderr}")
    return dict(json.loads(done.stdout.strip().splitlines()[-1]))


# ---- reads through the server -------------------------------------------------------------


def median_ms(client: httpx.Client, path: str, params: dict[str, str] | None = None) -> float:
    client.get(path, params=params).raise_for_status()  # warm
    times = []
    for _ in range(CALLS):
        started = time.perf_counter()
        r = client.get(path, params=params)
        times.append((time.perf_counter() - started) * 1000)
        r.raise_for_status()
    return statistics.median(times)


def timed_reads(url: str, token: str, log: Path) -> dict[str, float]:
    day = T0_US // DAY_US
    ranges = {
        # Six whole days from sketches plus two one-hour edges from raw rows.
        "metrics_edges": ((day + 10) * DAY_US + 23 * HOUR_US, (day + 17) * DAY_US + HOUR_US),
        # Twelve hours inside one day: all from raw rows.
        "metrics_in_day": ((day + 12) * DAY_US + 6 * HOUR_US, (day + 12) * DAY_US + 18 * HOUR_US),
    }
    out = {}
    with live.served(url, log) as server:
        headers = {"Authorization": f"Bearer {token}"}
        with httpx.Client(base_url=server.url, headers=headers, timeout=120) as client:
            out["status"] = median_ms(client, f"/v1/models/{MODEL}/status")
            for name, (lo, hi) in ranges.items():
                params = {
                    "start": format_instant(lo),
                    "end": format_instant(hi),
                    "slice": "region:coast",
                }
                out[name] = median_ms(client, f"/v1/models/{MODEL}/metrics", params)
    return out


# ---- one engine -----------------------------------------------------------------------------


@dataclass
class Result:
    engine: str
    rows: int
    figures: dict[str, Any] = field(default_factory=dict)
    sizes: dict[str, int] = field(default_factory=dict)


def run_engine(kind: str, args: argparse.Namespace, work: Path) -> Result:
    result = Result(kind, args.rows)
    f = result.figures
    url, schema = fresh_database(kind, work, args.pg_url)
    now_us = T0_US + (DAYS + HORIZON_DAYS) * DAY_US + 1_000_000
    profile = Path(args.profile) if args.profile else None
    if profile:
        profile.mkdir(parents=True, exist_ok=True)
    try:
        token = live.migrate_and_token(url, name="bench-admin")
        model_id = declare(url, now_us)
        print(f"[{kind}] loading {args.rows:,} predictions and their outcomes", flush=True)
        loader = load_direct if args.loader == "direct" else load
        loaded = loader(url, model_id, args.rows, args.seed, now_us, args.repeat)
        f["load_s"] = loaded["load_s"]
        f["loader"] = args.loader
        f["outcomes"] = loaded["outcomes"]
        print(f"[{kind}] loaded in {f['load_s']:.1f} s", flush=True)

        as_of = now_us  # one second after the last cohort matured
        copies = None
        if kind == "sqlite":
            db = Path(sa.engine.make_url(url).database or "")
            copies = []
            for name in ("warm-up.db", "evidence-off.db", "evidence-on.db"):
                shutil.copy(db, work / name)
                copies.append(f"sqlite:///{work / name}")
            f["pair_first"] = run_pair(*copies, as_of_us=as_of, now_us=as_of)
            print(f"[{kind}] first evaluation evidence off/on: {f['pair_first']}", flush=True)
        first = run_child(
            url, "evaluate", as_of_us=as_of, now_us=as_of,
            profile=profile / f"{kind}-first.prof" if profile else None,
        )  # fmt: skip
        f["first"] = first
        print(f"[{kind}] first evaluation {first['seconds']:.1f} s", flush=True)
        rebuilt = run_child(
            url, "rebuild", as_of_us=as_of, now_us=as_of,
            profile=profile / f"{kind}-rebuild.prof" if profile else None,
        )  # fmt: skip
        f["rebuild"] = rebuilt
        print(f"[{kind}] rebuild {rebuilt['seconds']:.1f} s", flush=True)

        f["incremental"] = []
        for j, batch in enumerate(withheld_batches(loaded["withheld"], args.seed, args.repeat)):
            at = as_of + (j + 1) * HOUR_US
            post_s = post_withheld(url, model_id, batch, at)
            step = run_child(
                url, "evaluate", as_of_us=at, now_us=at,
                profile=profile / f"{kind}-incremental-{j}.prof" if profile else None,
            )  # fmt: skip
            step.update(posted=len(batch), post_s=post_s, load_average=os.getloadavg()[0])
            f["incremental"].append(step)
            print(
                f"[{kind}] incremental evaluation {j + 1}: {step['seconds']:.2f} s "
                f"({step['cpu_seconds']:.2f} s CPU, load average {step['load_average']:.1f})",
                flush=True,
            )
        if copies is not None:
            # Evidence off against on, after the same new outcomes, in one process.
            batch = withheld_batches(loaded["withheld"], args.seed, args.repeat)[0]
            for copy in copies:
                post_withheld(copy, model_id, batch, as_of + HOUR_US)
            f["pair_incremental"] = run_pair(
                *copies, as_of_us=as_of + HOUR_US, now_us=as_of + HOUR_US
            )
            print(f"[{kind}] incremental evidence off/on: {f['pair_incremental']}", flush=True)

        f["reads"] = timed_reads(url, token, work / f"server-{kind}.log")
        result.sizes = table_sizes(url)
        return result
    finally:
        if schema is not None:
            drop_schema(args.pg_url, schema)


# ---- report ---------------------------------------------------------------------------------


def mib(n: int) -> str:
    return f"{n / 2**20:,.1f}"


def report(results: list[Result], argv: list[str]) -> None:
    print()
    print("command: .venv/bin/python tests/benchmarks/bench_evaluate.py " + " ".join(argv))
    for r in results:
        f = r.figures
        first, rebuilt, incs = f["first"], f["rebuild"], f["incremental"]
        wall = statistics.median(i["seconds"] for i in incs)
        cpu = statistics.median(i["cpu_seconds"] for i in incs)
        reads = f["reads"]
        loader = "bulk store primitives" if f.get("loader") == "direct" else "store.ingest"
        print()
        print(f"engine {r.engine}: {r.rows:,} predictions, {f['outcomes']:,} outcomes loaded")
        print(f"{'measure':58} {'value':>14} {'target':>10}")
        lines = [
            (f"load through {loader}, s", f"{f['load_s']:,.1f}", ""),
            ("load rate, predictions/s (outcomes alongside)", f"{r.rows / f['load_s']:,.0f}", ""),
            ("first evaluation (full recompute), s", f"{first['seconds']:,.2f}", ""),
            ("  CPU seconds", f"{first['cpu_seconds']:,.2f}", ""),
            ("  rows applied", f"{first['rows']:,}", ""),
            ("  peak RSS of the process, MiB", f"{first['rss_mib']:,.0f}", ""),
            ("rebuild_model, s", f"{rebuilt['seconds']:,.2f}", ""),
            ("  peak RSS of the process, MiB", f"{rebuilt['rss_mib']:,.0f}", "< 1,024"),
            (f"incremental evaluation after {incs[0]['posted']:,} new outcomes "
             f"(median of {len(incs)}), s", f"{wall:,.3f}", "< 2"),
            ("  CPU seconds (median)", f"{cpu:,.3f}", ""),
            ("  rows applied (first run)", f"{incs[0]['rows']:,}", ""),
            ("  peak RSS of the process, MiB (first run)", f"{incs[0]['rss_mib']:,.0f}", ""),
            ("  speed-up against the full recompute, wall", f"{first['seconds'] / wall:,.0f}x",
             ">= 20x"),
            ("  speed-up against the full recompute, CPU",
             f"{first['cpu_seconds'] / cpu:,.0f}x", ">= 20x"),
            ("GET /status, median of 20, ms", f"{reads['status']:,.1f}", "< 200"),
            ("GET /metrics 6 days + two 1 h edges, median, ms", f"{reads['metrics_edges']:,.1f}",
             "< 200"),
            ("GET /metrics 12 h inside one day, median, ms", f"{reads['metrics_in_day']:,.1f}",
             "< 200"),
        ]  # fmt: skip
        for name, value, target in lines:
            print(f"{name:58} {value:>14} {target:>10}")
        print(f"slices in the P28D window: {first['slices']}; health {incs[-1]['health']}")
        for j, i in enumerate(incs, start=1):
            print(
                f"incremental run {j}: {i['posted']:,} outcomes written in {i['post_s']:.2f} s; "
                f"run {i['seconds']:.3f} s, {i['cpu_seconds']:.3f} s CPU, "
                f"load average {i['load_average']:.1f}"
            )
        for step in ("pair_first", "pair_incremental"):
            if step in f:
                off, on = f[step]["off"], f[step]["on"]
                print(
                    f"{step[5:]} evaluation, evidence off -> on (one process): "
                    f"wall {off['seconds']:.2f} -> {on['seconds']:.2f} s "
                    f"(+{on['seconds'] / off['seconds'] - 1:.0%}), "
                    f"CPU {off['cpu']:.2f} -> {on['cpu']:.2f} s "
                    f"(+{on['cpu'] / off['cpu'] - 1:.0%}; target < +30%)"
                )
        raw = sum(r.sizes.get(t, 0) for t in RAW_TABLES)
        derived = sum(r.sizes.get(t, 0) for t in DERIVED_TABLES)
        print(f"{'table (' + r.engine + ', indexes included)':40} {'MiB':>12}")
        for t in (*RAW_TABLES, *DERIVED_TABLES):
            print(f"{t:40} {mib(r.sizes.get(t, 0)):>12}")
        print(f"{'raw total':40} {mib(raw):>12}")
        print(f"{'derived total':40} {mib(derived):>12}")
        print(f"{'derived / raw':40} {derived / raw:>12.4%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n")[0])
    parser.add_argument("--engine", choices=["sqlite", "postgresql", "both"], default="both")
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=20260301)
    parser.add_argument("--pg-url", default=DEFAULT_PG)
    parser.add_argument(
        "--repeat",
        type=int,
        default=1,
        help="incremental runs, each after its own batch of 10,000 new outcomes (median reported)",
    )
    parser.add_argument(
        "--loader",
        choices=["ingest", "direct"],
        default="ingest",
        help="ingest: store.ingest functions (default); direct: bulk store primitives",
    )
    parser.add_argument("--profile", help="write a cProfile of each evaluation step here")
    parser.add_argument("--keep", action="store_true", help="keep the work directory")
    # Internal: one step in a child process.
    parser.add_argument("--child", choices=["evaluate", "rebuild", "pair"], help=argparse.SUPPRESS)
    parser.add_argument("--url", help=argparse.SUPPRESS)
    parser.add_argument("--url-on", help=argparse.SUPPRESS)
    parser.add_argument("--url-warm", help=argparse.SUPPRESS)
    parser.add_argument("--as-of-us", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--now-us", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--profile-to", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child == "pair":
        pair(args)
        return
    if args.child:
        child(args)
        return
    kinds = ["sqlite", "postgresql"] if args.engine == "both" else [args.engine]
    work = Path(tempfile.mkdtemp(prefix="plumbwatch-bench-eval-"))
    try:
        results = [run_engine(k, args, work) for k in kinds]
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    report(results, sys.argv[1:])


if __name__ == "__main__":
    main()
