"""Stored sketches per (model, version, cohort day, slice), the cursor, and kept slice values."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from plumbwatch.stats.multiclass import MulticlassSketch
from plumbwatch.stats.sketch import Sketch
from plumbwatch.store.tables import evaluation_cursors, sketches, slice_values

BucketKey = tuple[str, int, str]  # (version, day, slice)


def empty_sketch(n_classes: int = 0) -> Any:
    """An empty sketch of the model's kind (0 classes: binary)."""
    if n_classes:
        return MulticlassSketch(
            tuple(Sketch.empty() for _ in range(n_classes)), Sketch.empty(), 0.0, 0.0
        )
    return Sketch.empty()


def _decode(data: bytes, n_classes: int) -> Any:
    return MulticlassSketch.from_bytes(data) if n_classes else Sketch.from_bytes(data)


@dataclass
class Bucket:
    """A sketch with the counts that stay outside it."""

    sketch: Any  # stats.Sketch, or stats.multiclass.MulticlassSketch
    matured: int = 0
    late: int = 0
    unlabelled: int = 0

    def __add__(self, other: Bucket) -> Bucket:
        return Bucket(
            self.sketch + other.sketch,
            self.matured + other.matured,
            self.late + other.late,
            self.unlabelled + other.unlabelled,
        )


def sum_buckets(buckets: Iterable[Bucket], n_classes: int = 0) -> Bucket:
    """The sum of ``buckets``: bin by bin the additions of folding them with ``+``
    from an empty bucket, in one accumulator instead of a new sketch per step."""
    items = list(buckets)
    if n_classes:
        sketch = empty_sketch(n_classes)
        for b in items:
            sketch = sketch + b.sketch
    else:
        sketch = Sketch.sum(b.sketch for b in items)
    return Bucket(
        sketch,
        sum(b.matured for b in items),
        sum(b.late for b in items),
        sum(b.unlabelled for b in items),
    )


@dataclass(frozen=True)
class Cursor:
    as_of_us: int
    prediction_seq: int
    outcome_seq: int
    revision_seq: int


def get_cursor(conn: sa.Connection, *, model_id: int) -> Cursor | None:
    row = conn.execute(
        sa.select(evaluation_cursors).where(evaluation_cursors.c.model_id == model_id)
    ).first()
    if row is None:
        return None
    return Cursor(row.as_of_us, row.prediction_seq, row.outcome_seq, row.revision_seq)


def save_cursor(conn: sa.Connection, *, model_id: int, cursor: Cursor, now_us: int) -> None:
    values = {
        "as_of_us": cursor.as_of_us,
        "prediction_seq": cursor.prediction_seq,
        "outcome_seq": cursor.outcome_seq,
        "revision_seq": cursor.revision_seq,
        "updated_at_us": now_us,
    }
    done = conn.execute(
        sa.update(evaluation_cursors)
        .where(evaluation_cursors.c.model_id == model_id)
        .values(**values)
    )
    if not done.rowcount:
        conn.execute(sa.insert(evaluation_cursors).values(model_id=model_id, **values))


def load_slice_values(conn: sa.Connection, *, model_id: int) -> dict[str, dict[str, int]]:
    kept: dict[str, dict[str, int]] = {}
    rows = conn.execute(
        sa.select(slice_values.c.key, slice_values.c.value, slice_values.c.position)
        .where(slice_values.c.model_id == model_id)
        .order_by(slice_values.c.key, slice_values.c.position)
    )
    for key, value, position in rows:
        kept.setdefault(key, {})[value] = position
    return kept


def add_slice_values(
    conn: sa.Connection, *, model_id: int, added: Iterable[tuple[str, str, int]]
) -> None:
    params = [{"model_id": model_id, "key": k, "value": v, "position": pos} for k, v, pos in added]
    if params:
        conn.execute(sa.insert(slice_values), params)


def load_buckets(
    conn: sa.Connection,
    *,
    model_id: int,
    keys: Iterable[BucketKey] | None = None,
    day_from: int | None = None,
    day_to: int | None = None,
    slice_name: str | None = None,
    n_classes: int = 0,
) -> dict[BucketKey, Bucket]:
    """Stored buckets: the given keys, or every bucket with day in [day_from, day_to)
    (of one slice if ``slice_name`` is given)."""
    t = sketches.c
    query = sa.select(t.version, t.day, t.slice, t.matured, t.late, t.unlabelled, t.data).where(
        t.model_id == model_id
    )
    if day_from is not None:
        query = query.where(t.day >= day_from)
    if day_to is not None:
        query = query.where(t.day < day_to)
    if slice_name is not None:
        query = query.where(t.slice == slice_name)
    wanted = set(keys) if keys is not None else None
    if wanted is not None:
        days = sorted({d for _, d, _ in wanted})
        if not days:
            return {}
        query = query.where(t.day.in_(days))
    out: dict[BucketKey, Bucket] = {}
    for row in conn.execute(query):
        key = (row.version, row.day, row.slice)
        if wanted is None or key in wanted:
            out[key] = Bucket(_decode(row.data, n_classes), row.matured, row.late, row.unlabelled)
    return out


def save_buckets(
    conn: sa.Connection,
    *,
    model_id: int,
    buckets: Mapping[BucketKey, Bucket],
    existing: set[BucketKey],
    now_us: int,
) -> None:
    """Write buckets back: update those in ``existing``, insert the others."""

    def params(key: BucketKey, b: Bucket) -> dict[str, Any]:
        return {
            "m": model_id,
            "v": key[0],
            "d": key[1],
            "s": key[2],
            "matured": b.matured,
            "late": b.late,
            "unlabelled": b.unlabelled,
            "data": b.sketch.to_bytes(),
            "at": now_us,
        }

    t = sketches.c
    updates = [params(k, b) for k, b in buckets.items() if k in existing]
    inserts = [params(k, b) for k, b in buckets.items() if k not in existing]
    if updates:
        conn.execute(
            sa.update(sketches)
            .where(
                t.model_id == sa.bindparam("m"),
                t.version == sa.bindparam("v"),
                t.day == sa.bindparam("d"),
                t.slice == sa.bindparam("s"),
            )
            .values(
                matured=sa.bindparam("matured"),
                late=sa.bindparam("late"),
                unlabelled=sa.bindparam("unlabelled"),
                data=sa.bindparam("data"),
                updated_at_us=sa.bindparam("at"),
            ),
            updates,
        )
    if inserts:
        conn.execute(
            sa.insert(sketches).values(
                model_id=sa.bindparam("m"),
                version=sa.bindparam("v"),
                day=sa.bindparam("d"),
                slice=sa.bindparam("s"),
                matured=sa.bindparam("matured"),
                late=sa.bindparam("late"),
                unlabelled=sa.bindparam("unlabelled"),
                data=sa.bindparam("data"),
                updated_at_us=sa.bindparam("at"),
            ),
            inserts,
        )


def delete_model_state(conn: sa.Connection, *, model_id: int) -> None:
    """Drop the derived state of a model (for a rebuild)."""
    for table in (sketches, evaluation_cursors, slice_values):
        conn.execute(sa.delete(table).where(table.c.model_id == model_id))
