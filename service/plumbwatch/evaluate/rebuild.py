"""``plumbwatch rebuild``: recompute a model's sketches from its raw rows.

The result must equal what the incremental runs built (exactly for the sum-based
statistics, up to float rounding of the order of additions). Rows are streamed,
so memory stays bounded however many rows the model has.
"""

from __future__ import annotations

from collections.abc import Callable

from sqlalchemy.engine import Engine

from plumbwatch.evaluate import deltas as deltas_mod
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.engine import writing
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.sketches import Cursor

_FLUSH_ROWS = 200_000


def rebuild_model(
    engine: Engine,
    model: MonitoredModel,
    *,
    now_us: int,
    slice_cap: int,
    progress: Callable[[int], None] | None = None,
) -> int:
    """Rebuild the model's sketches up to its last evaluated as_of; returns rows applied.

    Runs under the write lock of one transaction: readers see the old sketches or
    the new ones, never a mix.
    """
    decl = model.declaration
    horizon_us = decl.label_horizon_seconds * 1_000_000
    spec = SliceSpec(keys=decl.segment_keys, crosses=decl.crosses)
    with writing(engine) as write:
        previous = store_sketches.get_cursor(write, model_id=model.id)
        if previous is None:
            return 0
        # Everything stored now, at the last as_of: what an incremental run would reach.
        seqs = deltas_mod.current_seqs(write, model_id=model.id)
        store_sketches.delete_model_state(write, model_id=model.id)
        cap = ValueCap(slice_cap)
        k = len(model.classes)
        deltas = deltas_mod.Deltas(spec, cap, n_classes=k)
        total = 0

        def flush() -> None:
            nonlocal total
            stored = store_sketches.load_buckets(
                write, model_id=model.id, keys=deltas.keys, n_classes=k
            )
            touched = deltas.apply_to(stored)
            store_sketches.save_buckets(
                write, model_id=model.id, buckets=touched, existing=set(stored), now_us=now_us
            )
            total += deltas.rows
            deltas.reset()
            if progress:
                progress(total)

        deltas_mod.collect(
            write,
            model_id=model.id,
            horizon_us=horizon_us,
            missing_negative=decl.missing_outcome == "negative",
            previous=None,
            as_of_us=previous.as_of_us,
            seqs=seqs,
            deltas=deltas,
            flush=(_FLUSH_ROWS, flush),
        )
        flush()
        store_sketches.add_slice_values(write, model_id=model.id, added=cap.added)
        store_sketches.save_cursor(
            write, model_id=model.id, cursor=Cursor(previous.as_of_us, *seqs), now_us=now_us
        )
    return total
