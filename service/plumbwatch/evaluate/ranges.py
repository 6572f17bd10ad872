"""Metrics for any range of cohorts, exact at any bounds.

Whole UTC days come from the stored sketches; the partial days at either end
come from raw rows, classified exactly as the incremental runs classify them,
as of the model's latest evaluation (its cursor).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa

from plumbwatch.errors import NotFound
from plumbwatch.evaluate.cohorts import DAY_US, state_lookup
from plumbwatch.evaluate.immature import frozen_view
from plumbwatch.evaluate.metrics import slice_metrics
from plumbwatch.evaluate.slices import OTHER, OVERALL, SliceSpec, ValueCap, parse_slice
from plumbwatch.stats.multiclass import MulticlassSketch
from plumbwatch.stats.sketch import Sketch
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.sketches import Bucket, empty_sketch
from plumbwatch.store.tables import outcomes, predictions


def range_metrics(
    conn: sa.Connection,
    model: MonitoredModel,
    *,
    start_us: int,
    end_us: int,
    slice_name: str = OVERALL,
    version: str | None = None,
) -> tuple[int, dict[str, Any], dict[str, str]]:
    """(as_of, metrics, reasons) for cohorts with ``start <= predicted_at < end``."""
    cursor = store_sketches.get_cursor(conn, model_id=model.id)
    if cursor is None:
        raise NotFound(f"model {model.name!r} has not been evaluated yet")
    decl = model.declaration
    horizon_us = decl.label_horizon_seconds * 1_000_000
    frontier_us = cursor.as_of_us - horizon_us
    first_full = -(-start_us // DAY_US)  # first day starting at or after start
    end_full = end_us // DAY_US  # days before this end at or before end
    k = len(model.classes)
    total = Bucket(empty_sketch(k))
    if first_full < end_full:
        for (v, _day, name), b in store_sketches.load_buckets(
            conn,
            model_id=model.id,
            day_from=first_full,
            day_to=end_full,
            slice_name=slice_name,
            n_classes=k,
        ).items():
            if name == slice_name and (version is None or v == version):
                total = total + b
        edges = [(start_us, first_full * DAY_US), (end_full * DAY_US, end_us)]
    else:
        edges = [(start_us, end_us)]
    cap = ValueCap(0, store_sketches.load_slice_values(conn, model_id=model.id))
    spec = SliceSpec(keys=decl.segment_keys, crosses=decl.crosses)
    for lo, hi in edges:
        if lo < hi:
            total = total + _raw_bucket(
                conn,
                model,
                spec,
                frozen_view(cap),
                lo=lo,
                hi=min(hi, frontier_us + 1),
                slice_name=slice_name,
                version=version,
                horizon_us=horizon_us,
                max_ids=(cursor.prediction_seq, cursor.outcome_seq),
            )
    metrics, reasons = slice_metrics(total, model.classes or None)
    return cursor.as_of_us, metrics, reasons


def _raw_bucket(
    conn: sa.Connection,
    model: MonitoredModel,
    spec: SliceSpec,
    cap: ValueCap,
    *,
    lo: int,
    hi: int,
    slice_name: str,
    version: str | None,
    horizon_us: int,
    max_ids: tuple[int, int],
) -> Bucket:
    k = len(model.classes)
    if lo >= hi:
        return Bucket(empty_sketch(k))
    p, o = predictions.c, outcomes.c
    prob = (p.probabilities if k else p.probability).label("probability")
    # The row state needs only whether the outcome came within the horizon: SQL
    # decides that, so each row crosses the driver as two or three small values.
    on_time = sa.case(
        (o.observed_at_us.is_(None), None),
        (o.observed_at_us <= p.predicted_at_us + horizon_us, 1),
        else_=0,
    ).label("on_time")
    filtered = slice_name != OVERALL  # every row belongs to overall
    columns = [prob, o.outcome, on_time] + ([p.segments] if filtered else [])
    query = (
        sa.select(*columns)
        .select_from(
            predictions.outerjoin(outcomes, sa.and_(o.prediction_id == p.id, o.id <= max_ids[1]))
        )
        .where(
            p.model_id == model.id,
            p.id <= max_ids[0],
            p.predicted_at_us >= lo,
            p.predicted_at_us < hi,
        )
    )
    if version is not None:
        query = query.where(p.version == version)
    for key, value in parse_slice(slice_name):
        if value != OTHER:
            # A cheap text prefilter on the canonical JSON; the slice test below decides.
            fragment = f'"{key}":' + orjson.dumps(value).decode()
            query = query.where(p.segments.contains(fragment, autoescape=True))
    rows = conn.execute(query).all()
    if filtered and rows:
        # A day holds hundreds of thousands of rows but few distinct segment texts:
        # decide each once (the cap is frozen, so the answer cannot change).
        inside: dict[str | None, bool] = {}
        for text in {r[3] for r in rows}:
            parsed = orjson.loads(text) if text else {}
            inside[text] = slice_name in spec.names(parsed, cap)
        rows = [r for r in rows if inside[r[3]]]
    if not rows:
        return Bucket(empty_sketch(k))
    probabilities, outcome_col, on_time_col = list(zip(*rows, strict=True))[:3]
    # Few distinct (outcome, in time) pairs: classify each once, then index by row.
    state_of = state_lookup(
        horizon_us=horizon_us, missing_negative=model.declaration.missing_outcome == "negative"
    )
    kinds: dict[tuple[int | None, int | None], int] = {}
    code = np.fromiter(
        (kinds.setdefault(key, len(kinds)) for key in zip(outcome_col, on_time_col, strict=True)),
        np.intp,
        len(rows),
    )
    # An outcome observed at the prediction time is in time; one past the horizon is late.
    table = [
        state_of(0, outcome, None if t is None else (0 if t else horizon_us + 1))
        for outcome, t in kinds
    ]
    late = int(np.array([s.late for s in table])[code].sum())
    unlabelled = int(np.array([s.unlabelled for s in table])[code].sum())
    included = np.array([s.included for s in table])[code]
    if not included.any():
        return Bucket(empty_sketch(k), len(rows), late, unlabelled)
    ys = np.array([s.y for s in table])[code][included]
    if k:
        chosen = [orjson.loads(x) for x, keep in zip(probabilities, included, strict=True) if keep]
        sketch: Any = MulticlassSketch.from_arrays(ys, np.asarray(chosen, float))
    else:
        ps = np.asarray(probabilities, float)[included]
        sketch = Sketch.from_arrays(ys.astype(float), ps)
    return Bucket(sketch, len(rows), late, unlabelled)
