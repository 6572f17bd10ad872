"""Retention: prune raw rows older than a cut-off, in small batches.

Sketches and evaluation records are kept: they summarise what the raw rows
said. Only rows the evaluation has already applied are pruned (the caller
passes a cut-off before the model's maturity frontier), so nothing is lost
from the evaluation's point of view; a later ``plumbwatch rebuild`` covers
only the range that raw rows still reach.
"""

from __future__ import annotations

import sqlalchemy as sa

from plumbwatch.store.tables import (
    outcome_revisions,
    outcomes,
    predictions,
    row_keys,
    row_keys_recent,
)


def prune_batch(conn: sa.Connection, *, model_id: int, before_us: int, batch: int = 5_000) -> int:
    """Delete up to ``batch`` predictions made before ``before_us`` with their outcomes,
    correction history and id keys. Returns how many predictions were deleted."""
    ids = [
        r[0]
        for r in conn.execute(
            sa.select(predictions.c.id)
            .where(predictions.c.model_id == model_id, predictions.c.predicted_at_us < before_us)
            .order_by(predictions.c.predicted_at_us)
            .limit(batch)
        )
    ]
    if not ids:
        return 0
    outcome_ids = [
        r[0]
        for r in conn.execute(sa.select(outcomes.c.id).where(outcomes.c.prediction_id.in_(ids)))
    ]
    if outcome_ids:
        conn.execute(
            sa.delete(outcome_revisions).where(outcome_revisions.c.outcome_id.in_(outcome_ids))
        )
    for table in (row_keys, row_keys_recent):
        conn.execute(
            sa.delete(table).where(
                table.c.model_id == model_id, table.c.kind == "p", table.c.row_id.in_(ids)
            )
        )
        if outcome_ids:
            conn.execute(
                sa.delete(table).where(
                    table.c.model_id == model_id,
                    table.c.kind == "o",
                    table.c.row_id.in_(outcome_ids),
                )
            )
    if outcome_ids:
        conn.execute(sa.delete(outcomes).where(outcomes.c.id.in_(outcome_ids)))
    conn.execute(sa.delete(predictions).where(predictions.c.id.in_(ids)))
    return len(ids)


def oldest_prediction_us(conn: sa.Connection, *, model_id: int) -> int | None:
    value = conn.execute(
        sa.select(sa.func.min(predictions.c.predicted_at_us)).where(
            predictions.c.model_id == model_id
        )
    ).scalar_one()
    return int(value) if value is not None else None
