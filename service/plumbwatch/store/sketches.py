"""Stored sketches per (model, version, cohort day, slice), the cursor, and kept slice values.

A binary bucket is stored as a sketch in ``sketches`` plus, once later runs have
changed it, at most one row in ``sketch_patches`` holding the current values of the
bins changed since (and the current counts). A run that adds 10,000 outcomes over
3,000 buckets changes a few bins of each, so it writes those bins instead of
rewriting every bucket whole; the patch is folded back into the stored sketch once
it covers a share of the bucket (a share between 1/4 and 1/2 that differs from
bucket to bucket, so that buckets filled at the same pace fold in different runs).
Loading applies the patch (:meth:`Sketch.replace_bins`), so readers see exactly
the bucket a whole rewrite would have stored. Multiclass buckets are rewritten whole.
"""

from __future__ import annotations

import zlib
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import sqlalchemy as sa
from numpy.typing import NDArray

from plumbwatch.stats.multiclass import MulticlassSketch
from plumbwatch.stats.sketch import Sketch
from plumbwatch.store.tables import evaluation_cursors, sketch_patches, sketches, slice_values

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
    """A sketch with the counts that stay outside it.

    ``changed`` (binary buckets read from the store, and their updates): the bins
    that may differ from the stored sketch, so a save can write just those; None
    means the bucket is written whole. ``patched``: a patch row exists for it.
    """

    sketch: Any  # stats.Sketch, or stats.multiclass.MulticlassSketch
    matured: int = 0
    late: int = 0
    unlabelled: int = 0
    changed: NDArray[np.intp] | None = field(default=None, compare=False, repr=False)
    patched: bool = field(default=False, compare=False, repr=False)

    def __add__(self, other: Bucket) -> Bucket:
        return Bucket(
            self.sketch + other.sketch,
            self.matured + other.matured,
            self.late + other.late,
            self.unlabelled + other.unlabelled,
        )


# A window's sums: per slice across versions, and per (version, slice).
WindowSums = tuple[dict[str, Bucket], dict[tuple[str, str], Bucket]]


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


def _fetch(conn: sa.Connection, query: sa.Select[Any]) -> Iterator[tuple[Any, ...]]:
    """Rows of ``query`` as tuples, in this connection's transaction.

    On PostgreSQL the rows come in binary format: bytea in the default text format
    arrives hex-encoded, twice the bytes plus a decode (0.9 s instead of 0.25 s for
    the 66 MB of sketches of a 10-million-row model).
    """
    if conn.dialect.name != "postgresql":
        yield from conn.execute(query)
        return
    compiled = query.compile(dialect=conn.dialect, compile_kwargs={"render_postcompile": True})
    driver = conn.connection.driver_connection
    assert driver is not None
    with driver.cursor(binary=True) as cursor:
        cursor.execute(str(compiled), compiled.params)
        yield from cursor


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
    wanted = set(keys) if keys is not None else None
    days = sorted({d for _, d, _ in wanted}) if wanted is not None else None
    if days is not None and not days:
        return {}

    def select(table: sa.Table) -> sa.Select[Any]:
        t = table.c
        query = sa.select(t.version, t.day, t.slice, t.matured, t.late, t.unlabelled, t.data)
        query = query.where(t.model_id == model_id)
        if day_from is not None:
            query = query.where(t.day >= day_from)
        if day_to is not None:
            query = query.where(t.day < day_to)
        if slice_name is not None:
            query = query.where(t.slice == slice_name)
        if days is not None:
            query = query.where(t.day.in_(days))
        return query

    out: dict[BucketKey, Bucket] = {}
    for version, day, name, matured, late, unlabelled, data in _fetch(conn, select(sketches)):
        key = (version, day, name)
        if wanted is None or key in wanted:
            sketch = _decode(data, n_classes)
            # Binary buckets read from here may be saved as patches of this sketch.
            changed = None if n_classes else _NO_BINS
            out[key] = Bucket(sketch, matured, late, unlabelled, changed)
    if n_classes:
        return out
    for version, day, name, matured, late, unlabelled, data in _fetch(conn, select(sketch_patches)):
        key = (version, day, name)
        base = out.get(key)
        if base is None:
            continue  # not asked for (a patch never outlives its stored sketch)
        patch = Sketch.from_bytes(data)
        sketch = base.sketch.replace_bins(patch)
        out[key] = Bucket(sketch, matured, late, unlabelled, patch.held_bins(), patched=True)
    return out


_NO_BINS = np.zeros(0, np.intp)
_NO_BINS.setflags(write=False)


def _fold_share(key: BucketKey) -> float:
    # Between 1/4 and 1/2 of the bucket, fixed per bucket (see the module docstring).
    return 0.25 + (zlib.crc32(repr(key).encode()) % 9) / 32


def _as_patch(key: BucketKey, b: Bucket) -> bool:
    """Whether to save ``b`` as a patch of its stored sketch rather than whole."""
    if b.changed is None:
        return False
    return b.changed.size <= _fold_share(key) * b.sketch.held_bins().size


def save_buckets(
    conn: sa.Connection,
    *,
    model_id: int,
    buckets: Mapping[BucketKey, Bucket],
    existing: set[BucketKey],
    now_us: int,
) -> None:
    """Write buckets back: insert the new ones; for those in ``existing`` write the
    changed bins as a patch, or the whole bucket (then dropping its patch)."""

    def params(key: BucketKey, b: Bucket, data: bytes) -> dict[str, Any]:
        return {
            "m": model_id,
            "v": key[0],
            "d": key[1],
            "s": key[2],
            "matured": b.matured,
            "late": b.late,
            "unlabelled": b.unlabelled,
            "data": data,
            "at": now_us,
        }

    Rows = list[dict[str, Any]]
    inserts: Rows = []
    updates: Rows = []
    patches: Rows = []
    new_patches: Rows = []
    dropped: Rows = []
    for key, b in buckets.items():
        if key not in existing:
            inserts.append(params(key, b, b.sketch.to_bytes()))
        elif _as_patch(key, b):
            assert b.changed is not None
            row = params(key, b, b.sketch.to_bytes(bins=b.changed))
            (patches if b.patched else new_patches).append(row)
        else:
            updates.append(params(key, b, b.sketch.to_bytes()))
            if b.patched:
                dropped.append({"m": model_id, "v": key[0], "d": key[1], "s": key[2]})

    if conn.dialect.name == "postgresql" and (inserts or updates) and _has_lz4(conn):
        # Float sums barely compress: the default pglz spends seconds per run
        # finding that out on every large value; lz4 is quick and still saves a bit.
        conn.exec_driver_sql("SET LOCAL default_toast_compression = 'lz4'")
    values: dict[str, Any] = {
        "matured": sa.bindparam("matured"),
        "late": sa.bindparam("late"),
        "unlabelled": sa.bindparam("unlabelled"),
        "data": sa.bindparam("data"),
        "updated_at_us": sa.bindparam("at"),
    }
    for table, rows in ((sketches, updates), (sketch_patches, patches)):
        if rows:
            conn.execute(sa.update(table).where(*_matches(table)).values(**values), rows)
    for table, rows in ((sketches, inserts), (sketch_patches, new_patches)):
        if rows:
            key_values: dict[str, Any] = {
                "model_id": sa.bindparam("m"),
                "version": sa.bindparam("v"),
                "day": sa.bindparam("d"),
                "slice": sa.bindparam("s"),
            }
            conn.execute(sa.insert(table).values(**key_values, **values), rows)
    if dropped:
        conn.execute(sa.delete(sketch_patches).where(*_matches(sketch_patches)), dropped)


def _matches(table: sa.Table) -> list[sa.ColumnElement[bool]]:
    t = table.c
    return [
        t.model_id == sa.bindparam("m"),
        t.version == sa.bindparam("v"),
        t.day == sa.bindparam("d"),
        t.slice == sa.bindparam("s"),
    ]


def _has_lz4(conn: sa.Connection) -> bool:
    """Whether this PostgreSQL server can compress TOAST values with lz4 (14+, built with it)."""
    found = conn.execute(
        sa.text(
            "SELECT 1 FROM pg_settings WHERE name = 'default_toast_compression' "
            "AND 'lz4' = ANY(enumvals)"
        )
    ).first()
    return found is not None


def delete_model_state(conn: sa.Connection, *, model_id: int) -> None:
    """Drop the derived state of a model (for a rebuild)."""
    for table in (sketch_patches, sketches, evaluation_cursors, slice_values):
        conn.execute(sa.delete(table).where(table.c.model_id == model_id))
