"""Status page report: render times with 10 models x 100 slices x 90 days of history.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_pages.py [--engine sqlite|postgresql|both]
        [--repeat N]

Per engine, in a fresh database (a SQLite file under a temporary directory, or a
fresh schema on PostgreSQL), migrated:

1. Ten binary models ``m0`` .. ``m9``, each with one segment key ``depot`` of 99
   values (overall + 99 slices = 100 slices), windows P7D and P28D, label
   horizon P3D.
2. Sketches: for each model, slice and cohort day of the last 90 days, one
   bucket of 100 rows (fixed seed), written with ``store.sketches.save_buckets``
   (90,000 buckets in all, as the evaluation would store them), and a cursor.
3. History: one evaluation record per model and day for 90 days, written with
   ``store.evaluations.create``. The slice entries carry the metrics that
   ``evaluate.metrics.slice_metrics`` computes from the summed sketches of each
   window, jittered per day so that no two records are alike, and a baseline
   block naming the first 28 days.
4. The app in-process (``create_app`` and a test client) with a read token.
   The app reads each model's history in the background at start; the report
   gives how long that took, then per page: the first request after it, then the
   median of ``--repeat`` requests (the steady state), and for the model page a
   slice not drawn before. Wall time and process CPU time (all threads of this
   process) are both given: the CPU time is what the page costs, the wall time
   also carries whatever else the machine runs.

This is a report, not a test: it asserts nothing. The target is 150 ms per page.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import sqlalchemy as sa

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from fastapi.testclient import TestClient  # noqa: E402

from plumbwatch.api import create_app  # noqa: E402
from plumbwatch.config import Settings  # noqa: E402
from plumbwatch.declarations import ModelDeclaration  # noqa: E402
from plumbwatch.evaluate.cohorts import DAY_US  # noqa: E402
from plumbwatch.evaluate.metrics import slice_metrics  # noqa: E402
from plumbwatch.stats.sketch import Sketch  # noqa: E402
from plumbwatch.store import evaluations as store_evaluations  # noqa: E402
from plumbwatch.store import models as store_models  # noqa: E402
from plumbwatch.store import sketches as store_sketches  # noqa: E402
from plumbwatch.store import tokens  # noqa: E402
from plumbwatch.store.engine import create_engine  # noqa: E402
from plumbwatch.store.migrate import upgrade  # noqa: E402
from plumbwatch.store.sketches import Bucket, Cursor  # noqa: E402
from plumbwatch.timefmt import format_instant, parse_instant, to_micros  # noqa: E402

MODELS, SLICES, DAYS, ROWS = 10, 100, 90, 100
NOW_US = to_micros(parse_instant("2026-06-01T12:00:00Z"))
LAST_DAY = NOW_US // DAY_US - 4  # the newest matured cohort day at NOW (horizon 3 days)
PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


def slice_names() -> list[str]:
    return ["overall"] + [f"depot:d{k:02d}" for k in range(SLICES - 1)]


def build_sketches(seed: int) -> dict[tuple[int, str], Bucket]:
    """One bucket per (day, slice); rows of the overall slice are every depot's."""
    rng = np.random.default_rng(seed)
    names = slice_names()
    n = DAYS * (SLICES - 1) * ROWS
    p = rng.beta(2, 6, size=n)
    y = (rng.random(n) < np.clip(p * 1.1, 0, 1)).astype(float)
    groups = np.repeat(np.arange(DAYS * (SLICES - 1)), ROWS)
    per_group = Sketch.from_arrays_grouped(y, p, groups, DAYS * (SLICES - 1))
    out: dict[tuple[int, str], Bucket] = {}
    for d in range(DAYS):
        day = LAST_DAY - DAYS + 1 + d
        depot = per_group[d * (SLICES - 1) : (d + 1) * (SLICES - 1)]
        out[(day, "overall")] = Bucket(Sketch.sum(depot), ROWS * (SLICES - 1), 2, 5)
        for k, s in enumerate(depot):
            out[(day, names[k + 1])] = Bucket(s, ROWS, 0, 1)
    return out


def window_metrics(buckets: dict[tuple[int, str], Bucket], days: int) -> dict[str, dict[str, Any]]:
    out = {}
    for name in slice_names():
        total = Bucket(Sketch.empty())
        for d in range(LAST_DAY - days + 1, LAST_DAY + 1):
            total = total + buckets[(d, name)]
        out[name] = slice_metrics(total)
    return out


def record(
    model: str, day_index: int, metrics: dict[int, dict[str, Any]], rng: Any
) -> dict[str, Any]:
    as_of_us = NOW_US - (DAYS - 1 - day_index) * DAY_US
    windows = []
    for days in (7, 28):
        end = (LAST_DAY + 1 - (DAYS - 1 - day_index)) * DAY_US
        entries = []
        for name in slice_names():
            values, reasons = metrics[days][name]
            jitter = 1 + 0.02 * rng.standard_normal()
            m = {k: (v * jitter if isinstance(v, float) else v) for k, v in values.items()}
            m["log_evidence"], m["log_threshold"] = float(rng.uniform(0, 6)), 9.2
            entries.append(
                {
                    "slice": name,
                    "version": None,
                    "health": "ok",
                    "metrics": m,
                    "reasons": reasons,
                    "signals": {"evidence": False, "material": False, "fdr": False},
                }
            )
        windows.append(
            {
                "window": f"P{days}D",
                "start": format_instant(end - days * DAY_US),
                "end": format_instant(end),
                "slices": entries,
            }
        )
    first = (LAST_DAY - DAYS + 1) * DAY_US
    return {
        "model": model,
        "as_of": format_instant(as_of_us),
        "evaluated_at": format_instant(as_of_us + 60_000_000),
        "health": "ok",
        "windows": windows,
        "immature": [],
        "evidence": [],
        "baseline": {
            "v1": {"start": format_instant(first), "end": format_instant(first + 28 * DAY_US)}
        },
        "recalibration": None,
        "alerts": [],
        "slice_cap": {"cap": 100, "capped_keys": []},
        "rows_applied": 0,
        "raw_rows_from": None,
    }


def seed(engine: sa.Engine) -> str:
    t0 = time.perf_counter()
    buckets = build_sketches(seed=7)
    metrics = {days: window_metrics(buckets, days) for days in (7, 28)}
    print(f"  sketches and metrics built in {time.perf_counter() - t0:.1f} s", flush=True)
    decl = ModelDeclaration.model_validate(
        {"kind": "binary", "label_horizon": "P3D", "segment_keys": ["depot"]}
    )
    rng = np.random.default_rng(11)
    for i in range(MODELS):
        name = f"m{i}"
        t0 = time.perf_counter()
        with engine.begin() as conn:
            model, _ = store_models.upsert(conn=conn, name=name, declaration=decl, now_us=NOW_US)
            store_sketches.save_buckets(
                conn,
                model_id=model.id,
                buckets={("v1", d, s): b for (d, s), b in buckets.items()},
                existing=set(),
                now_us=NOW_US,
            )
            store_sketches.save_cursor(
                conn, model_id=model.id, cursor=Cursor(NOW_US, 0, 0, 0), now_us=NOW_US
            )
        for d in range(DAYS):
            rec = record(name, d, metrics, rng)
            with engine.begin() as conn:
                store_evaluations.create(
                    conn,
                    model_id=model.id,
                    as_of_us=to_micros(parse_instant(rec["as_of"])),
                    evaluated_at_us=to_micros(parse_instant(rec["evaluated_at"])),
                    health="ok",
                    record=rec,
                )
        took = time.perf_counter() - t0
        print(f"  {name}: {len(buckets):,} buckets, {DAYS} records in {took:.1f} s", flush=True)
    with engine.begin() as conn:
        _, secret = tokens.create(conn=conn, name="bench", scope="read", now_us=NOW_US)
    return secret


def timed(client: TestClient, path: str, headers: dict[str, str]) -> tuple[float, float]:
    w0, c0 = time.perf_counter(), time.process_time()
    r = client.get(path, headers=headers)
    w1, c1 = time.perf_counter(), time.process_time()
    assert r.status_code == 200, (path, r.status_code, r.text[:300])
    return (w1 - w0) * 1000, (c1 - c0) * 1000


def measure(url: str, secret: str, repeat: int) -> list[tuple[str, float, float]]:
    engine = create_engine(url)
    app = create_app(
        Settings(database_url=url, scheduler="off"), engine=engine, clock_us=lambda: NOW_US
    )
    headers = {"Authorization": f"Bearer {secret}"}
    rows = []
    with TestClient(app) as client:
        # The app reads each model's history in the background at start (warm-pages).
        w0 = time.perf_counter()
        for thread in threading.enumerate():
            if thread.name == "warm-pages":
                thread.join()
        rows.append(("start-up warm-up in the background, ms", (time.perf_counter() - w0) * 1000,
                     float("nan")))  # fmt: skip
        for label, path in (("overview /", "/"), ("model page /models/m0", "/models/m0")):
            wall, cpu = timed(client, path, headers)
            rows.append((f"{label}, first request after the warm-up", wall, cpu))
            samples = [timed(client, path, headers) for _ in range(repeat)]
            rows.append(
                (
                    f"{label}, median of {repeat}",
                    statistics.median(s[0] for s in samples),
                    statistics.median(s[1] for s in samples),
                )
            )
        wall, cpu = timed(client, "/models/m0?slice=depot%3Ad42", headers)
        rows.append(("model page, a slice not drawn before", wall, cpu))
        size = len(client.get("/models/m0", headers=headers).content)
        rows.append((f"model page size: {size / 1024:.0f} KiB", float("nan"), float("nan")))
    engine.dispose()
    return rows


def run(kind: str, repeat: int) -> list[tuple[str, float, float]]:
    with tempfile.TemporaryDirectory() as work:
        schema = None
        if kind == "sqlite":
            url = f"sqlite:///{Path(work) / 'pages.db'}"
        else:
            schema = f"bench_{uuid.uuid4().hex[:10]}"
            admin = sa.create_engine(PG_URL)
            with admin.begin() as conn:
                conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
            url = (
                sa.engine.make_url(PG_URL)
                .update_query_dict({"options": f"-csearch_path={schema}"})
                .render_as_string(hide_password=False)
            )
        try:
            engine = create_engine(url)
            upgrade(engine)
            print(f"[{kind}] seeding {MODELS} models x {SLICES} slices x {DAYS} days", flush=True)
            secret = seed(engine)
            engine.dispose()
            return measure(url, secret, repeat)
        finally:
            if schema is not None:
                with admin.begin() as conn:
                    conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
                admin.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--engine", choices=("sqlite", "postgresql", "both"), default="sqlite")
    parser.add_argument("--repeat", type=int, default=20)
    args = parser.parse_args()
    kinds = ["sqlite", "postgresql"] if args.engine == "both" else [args.engine]
    results = {kind: run(kind, args.repeat) for kind in kinds}
    print()
    print("command: .venv/bin/python tests/benchmarks/bench_pages.py " + " ".join(sys.argv[1:]))
    for kind, rows in results.items():
        print(f"\nengine {kind} (target: < 150 ms per page)")
        print(f"{'measure':52} {'wall ms':>10} {'CPU ms':>10}")
        for label, wall, cpu in rows:
            if wall != wall:  # NaN: an informational line
                print(label)
            else:
                print(f"{label:52} {wall:>10.1f} {cpu:>10.1f}")


if __name__ == "__main__":
    main()
