"""One evaluation run of one model: apply the deltas, sum the windows, persist the record.

The run reads in one snapshot, computes, then writes sketches, cursor, evidence
streams and the evaluation record in one short transaction, so a crash leaves
either the whole run or nothing. Callers hold the model's lease (see
``plumbwatch.jobs``). Evidence, score drift, false-discovery control, health and
recalibration advice are ``evaluate/evidence.py``, ``drift.py``, ``fdr.py``,
``verdicts.py`` and ``advice.py``, brought together by ``assess.py``.
"""

from __future__ import annotations

from collections import ChainMap, defaultdict
from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.errors import Conflict
from plumbwatch.evaluate import assess, drift
from plumbwatch.evaluate import deltas as deltas_mod
from plumbwatch.evaluate import evidence as evidence_mod
from plumbwatch.evaluate.assess import Assessment
from plumbwatch.evaluate.cohorts import Window, frontier, window
from plumbwatch.evaluate.immature import immature_summary
from plumbwatch.evaluate.metrics import health, slice_metrics, worst
from plumbwatch.evaluate.options import Options
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import evidence as store_evidence
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.retention import oldest_prediction_us
from plumbwatch.store.sketches import (
    Bucket,
    BucketKey,
    Cursor,
    WindowSums,
    empty_sketch,
    sum_buckets,
)
from plumbwatch.timefmt import format_instant, parse_duration

_FLUSH_ROWS = 200_000
_DEFAULTS = Options()


# Called inside the run's write transaction, after the record is stored, with
# (connection, model, evaluation id, record, notify). It may change the record
# (health, alerts), which is then stored again in the same transaction, so later
# layers (alerts) commit or fail together with the evaluation they act on.
AfterRecord = Callable[[sa.Connection, MonitoredModel, int, dict[str, Any], bool], None]


def _snapshot(engine: Engine) -> sa.Connection:
    conn = engine.connect()
    if conn.dialect.name == "postgresql":
        conn = conn.execution_options(isolation_level="REPEATABLE READ")
    return conn


def evaluate_model(
    engine: Engine,
    model: MonitoredModel,
    *,
    as_of_us: int,
    now_us: int,
    options: Options = _DEFAULTS,
    notify: bool = True,
    after_record: AfterRecord | None = None,
) -> dict[str, Any]:
    """Run one evaluation as of ``as_of_us`` and persist its record; return the record.

    ``notify`` is handed to ``after_record`` (False: a backfill that must not page).
    """
    decl = model.declaration
    k = len(model.classes)
    horizon_us = decl.label_horizon_seconds * 1_000_000
    spec = SliceSpec(keys=decl.segment_keys, crosses=decl.crosses)
    with _snapshot(engine) as conn, conn.begin():
        previous = store_sketches.get_cursor(conn, model_id=model.id)
        cap = ValueCap(options.slice_cap, store_sketches.load_slice_values(conn, model_id=model.id))
        seqs = deltas_mod.current_seqs(conn, model_id=model.id)
        replay_backwards = previous is not None and as_of_us < previous.as_of_us
        windows = _windows(decl.windows, frontier_us=frontier(as_of_us, horizon_us))
        if replay_backwards:
            # Answered from raw rows (the deltas start from nothing); the stored
            # state, which is further ahead, stays as it is.
            stored: dict[BucketKey, Bucket] = {}
        else:
            stored = store_sketches.load_buckets(
                conn,
                model_id=model.id,
                day_from=min(w.first_day for w in windows),
                day_to=max(w.end_day for w in windows),
                n_classes=k,
            )
        deltas = deltas_mod.Deltas(spec, cap, n_classes=k)
        touched: dict[BucketKey, Bucket] = {}
        rows_applied = 0

        def flush() -> None:
            # Apply what is pending, so memory stays bounded on a first run over
            # millions of rows; buckets outside the windows are loaded as needed.
            nonlocal rows_applied
            if not replay_backwards:
                missing = [key for key in deltas.keys if key not in touched and key not in stored]
                stored.update(
                    store_sketches.load_buckets(conn, model_id=model.id, keys=missing, n_classes=k)
                )
            touched.update(deltas.apply_to(ChainMap(touched, stored)))
            rows_applied += deltas.rows
            deltas.reset()

        pending = None
        if options.evidence and not replay_backwards:
            pending = evidence_mod.prepare(
                conn,
                model_id=model.id,
                n_classes=k,
                as_of_us=as_of_us,
                horizon_us=horizon_us,
                grace_us=options.evidence_grace_us,
                sketch_frontier_us=previous.as_of_us - horizon_us if previous else None,
            )
        deltas_mod.collect(
            conn,
            model_id=model.id,
            horizon_us=horizon_us,
            missing_negative=decl.missing_outcome == "negative",
            previous=None if replay_backwards else previous,
            as_of_us=as_of_us,
            seqs=seqs,
            deltas=deltas,
            flush=(_FLUSH_ROWS, flush),
            watch=pending.watch if pending else None,
        )
        flush()
        version_now = drift.current_version(
            conn, model_id=model.id, as_of_us=as_of_us, max_id=seqs[0]
        )
        immature, immature_scores = immature_summary(
            conn,
            model_id=model.id,
            spec=spec,
            cap=cap,
            frontier_us=frontier(as_of_us, horizon_us),
            as_of_us=as_of_us,
            max_prediction_id=seqs[0],
            multiclass_model=k > 0,
            version=version_now,
        )
        raw_from = oldest_prediction_us(conn, model_id=model.id)
        current = {**stored, **touched}
        assessment = assess.build(
            conn, model, options, windows, version_now, replay_backwards, pending,
            as_of_us=as_of_us, seqs=seqs, spec=spec, cap=cap, touched=touched, buckets=current,
        )  # fmt: skip
        # Each window's sums per slice, and per (version, slice): the record and the
        # advice both read them.
        sums = {w.name: _sum(current, w, k) for w in windows}
        recalibration = assess.recalibration(
            conn, model, options, windows, current, sums, assessment, spec=spec, cap=cap
        )
    record = _record(
        model,
        windows,
        sums,
        immature,
        cap,
        as_of_us=as_of_us,
        now_us=now_us,
        options=options,
        rows_applied=rows_applied,
        raw_from=raw_from,
        assessment=assessment,
    )
    if options.evidence:
        assessment.finish(record, immature_scores)
        record["recalibration"] = recalibration
    ev = assessment.evidence
    with writing(engine) as write:
        if not replay_backwards:
            if store_sketches.get_cursor(write, model_id=model.id) != previous:
                raise Conflict(
                    f"model {model.name!r} was evaluated by another run meanwhile; "
                    "nothing was written"
                )
            # Only buckets the deltas touched are written back.
            store_sketches.save_buckets(
                write, model_id=model.id, buckets=touched, existing=set(stored), now_us=now_us
            )
            store_sketches.add_slice_values(write, model_id=model.id, added=cap.added)
            store_sketches.save_cursor(
                write, model_id=model.id, cursor=Cursor(as_of_us, *seqs), now_us=now_us
            )
            if assessment.baselines is not None:
                store_evidence.add_baselines(
                    write, model_id=model.id, fixed=assessment.baselines.fixed_now, now_us=now_us
                )
        if ev is not None:
            latest = store_evidence.latest_reset(write, model_id=model.id)
            if (latest.id if latest else None) != ev.reset_id:
                raise Conflict(
                    f"the evidence of model {model.name!r} was reset during this run; "
                    "nothing was written, evaluate again"
                )
            store_evidence.save_streams(
                write, model_id=model.id, streams=ev.to_store(), existing=ev.existing, now_us=now_us
            )
            store_evidence.save_cursor(write, model_id=model.id, cursor=ev.cursor, now_us=now_us)
        evaluation_id = store_evaluations.create(
            write,
            model_id=model.id,
            as_of_us=as_of_us,
            evaluated_at_us=now_us,
            health=record["health"],
            record=record,
        )
        if after_record is not None:
            after_record(write, model, evaluation_id, record, notify)
            store_evaluations.update_record(
                write, evaluation_id=evaluation_id, health=record["health"], record=record
            )
    return record


def _windows(names: list[str], *, frontier_us: int) -> list[Window]:
    return [
        window(name, int(parse_duration(name).total_seconds() // 86_400), frontier_us=frontier_us)
        for name in names
    ]


def _sum(buckets: dict[BucketKey, Bucket], w: Window, n_classes: int) -> WindowSums:
    """Per slice across versions, and per (version, slice), over the window's days."""
    per_slice: dict[str, list[Bucket]] = defaultdict(list)
    per_version: dict[tuple[str, str], list[Bucket]] = defaultdict(list)
    for (version, day, name), b in buckets.items():
        if w.first_day <= day < w.end_day:
            per_slice[name].append(b)
            per_version[(version, name)].append(b)
    # As before: a slice or version missing from the window reads as an empty bucket.
    overall: dict[str, Bucket] = defaultdict(lambda: Bucket(empty_sketch(n_classes)))
    by_version: dict[tuple[str, str], Bucket] = defaultdict(lambda: Bucket(empty_sketch(n_classes)))
    overall.update((name, sum_buckets(bs, n_classes)) for name, bs in per_slice.items())
    # With one version its sums are the slices' sums: the same buckets in the same order.
    single = len({v for v, _ in per_version}) == 1
    by_version.update(
        (key, overall[key[1]] if single else sum_buckets(bs, n_classes))
        for key, bs in per_version.items()
    )
    return overall, by_version


def _slice_entry(
    name: str,
    bucket: Bucket,
    options: Options,
    version: str | None,
    classes: list[str],
    w: Window,
    assessment: Assessment,
) -> dict[str, Any]:
    metrics, reasons = slice_metrics(bucket, classes or None)
    entry: dict[str, Any] = {
        "slice": name,
        "version": version,
        "health": health(bucket, min_events=options.min_events, multiclass_model=bool(classes)),
        "metrics": metrics,
        "reasons": reasons,
    }
    if options.evidence:
        assessment.slice_entry(w, entry, bucket)
    return entry


def _record(
    model: MonitoredModel,
    windows: list[Window],
    sums: dict[str, WindowSums],
    immature: list[dict[str, Any]],
    cap: ValueCap,
    *,
    as_of_us: int,
    now_us: int,
    options: Options,
    rows_applied: int,
    raw_from: int | None,
    assessment: Assessment,
) -> dict[str, Any]:
    out_windows = []
    states = []
    for w in windows:
        overall, by_version = sums[w.name]
        if "overall" not in overall:
            overall["overall"] = Bucket(empty_sketch(len(model.classes)))
        versions = sorted({v for v, _ in by_version})
        entries = [
            _slice_entry(name, overall[name], options, None, model.classes, w, assessment)
            for name in _ordered(overall)
        ]
        if len(versions) > 1:
            entries += [
                _slice_entry(name, by_version[(v, name)], options, v, model.classes, w, assessment)
                for v in versions
                for name in _ordered({n for vv, n in by_version if vv == v})
            ]
        states += [e["health"] for e in entries]
        out_windows.append(
            {
                "window": w.name,
                "start": format_instant(w.start_us),
                "end": format_instant(w.end_us),
                "slices": entries,
            }
        )
    return {
        "model": model.name,
        "as_of": format_instant(as_of_us),
        "evaluated_at": format_instant(now_us),
        "health": worst(states),
        "windows": out_windows,
        "immature": immature,
        "evidence": [],
        "fdr": None,
        "baseline": None,
        "recalibration": None,
        "alerts": [],
        "slice_cap": {"cap": cap.cap, "capped_keys": cap.capped_keys()},
        "rows_applied": rows_applied,
        "raw_rows_from": format_instant(raw_from) if raw_from is not None else None,
    }


def _ordered(names: Any) -> list[str]:
    return sorted(names, key=lambda n: (n != "overall", n.count(","), n))


__all__ = ["AfterRecord", "Options", "evaluate_model"]
