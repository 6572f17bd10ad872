"""Buckets saved as patches of their stored sketch read back exactly as whole rewrites."""

from __future__ import annotations

import numpy as np
import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.declarations import ModelDeclaration
from plumbwatch.stats.sketch import Sketch
from plumbwatch.store import models as store_models
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.sketches import Bucket
from plumbwatch.store.tables import sketch_patches, sketches


def _model(engine: Engine) -> int:
    decl = ModelDeclaration.model_validate({"kind": "binary", "label_horizon": "P1D"})
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name="m", declaration=decl, now_us=0)
    return model.id


def _rows(seed: int, n: int) -> Sketch:
    rng = np.random.default_rng(seed)
    p = rng.beta(2, 5, n)
    return Sketch.from_arrays((rng.random(n) < p).astype(int), p)


def _count(engine: Engine, table: sa.Table) -> int:
    with engine.connect() as conn:
        return int(conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one())


def _update(bucket: Bucket, add: Sketch, remove: Sketch | None = None) -> Bucket:
    # What evaluate.deltas does to a stored bucket: new sums, and the bins they touched.
    sketch = bucket.sketch + add
    moved = [add.held_bins()]
    if remove is not None:
        sketch = sketch - remove
        moved.append(remove.held_bins())
    assert bucket.changed is not None
    changed = np.union1d(bucket.changed, np.concatenate(moved))
    return Bucket(
        sketch, bucket.matured + 1, bucket.late, bucket.unlabelled, changed, bucket.patched
    )


def test_patches_then_fold_read_back_exactly(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    mid = _model(engine)
    key = ("v1", 20_000, "overall")
    first = _rows(1, 5_000)

    def save(bucket: Bucket, existing: bool) -> None:
        with engine.begin() as conn:
            store_sketches.save_buckets(
                conn,
                model_id=mid,
                buckets={key: bucket},
                existing={key} if existing else set(),
                now_us=1,
            )

    def load() -> Bucket:
        with engine.connect() as conn:
            return store_sketches.load_buckets(conn, model_id=mid, keys=[key])[key]

    save(Bucket(first, 10, 1, 2), existing=False)
    stored = load()
    assert stored.sketch == first and stored.changed is not None and not stored.patched

    # A few rows change a few bins: saved as a patch, read back bit for bit.
    second = _update(stored, _rows(2, 5))
    save(second, existing=True)
    assert _count(engine, sketch_patches) == 1
    back = load()
    assert back.patched and back.sketch == second.sketch
    assert back.sketch.to_bytes() == second.sketch.to_bytes()
    assert (back.matured, back.late, back.unlabelled) == (11, 1, 2)

    # Removing rows (a correction) empties bins; the patch carries them as empty.
    third = _update(back, _rows(3, 4), remove=_rows(2, 5))
    save(third, existing=True)
    assert _count(engine, sketch_patches) == 1
    assert load().sketch == third.sketch
    assert third.sketch.allclose(first + _rows(3, 4), rtol=1e-12)

    # Once the changed bins pass the bucket's share, the bucket is written whole.
    monkeypatch.setattr(store_sketches, "_fold_share", lambda _key: 0.0)
    fourth = _update(load(), _rows(4, 50))
    save(fourth, existing=True)
    assert _count(engine, sketch_patches) == 0 and _count(engine, sketches) == 1
    assert load().sketch == fourth.sketch and not load().patched

    with engine.begin() as conn:
        store_sketches.delete_model_state(conn, model_id=mid)
    assert _count(engine, sketches) == 0


def test_new_and_multiclass_buckets_are_written_whole(engine: Engine) -> None:
    mid = _model(engine)
    key = ("v1", 20_000, "overall")
    with engine.begin() as conn:
        # No `changed` bins: whole, even for a bucket stored before.
        store_sketches.save_buckets(
            conn, model_id=mid, buckets={key: Bucket(_rows(5, 100))}, existing=set(), now_us=1
        )
        store_sketches.save_buckets(
            conn, model_id=mid, buckets={key: Bucket(_rows(6, 100))}, existing={key}, now_us=2
        )
    assert _count(engine, sketch_patches) == 0
    with engine.connect() as conn:
        assert store_sketches.load_buckets(conn, model_id=mid)[key].sketch == _rows(6, 100)
