"""Reads for the status pages: the latest record's id, thinned history, the current version.

Records are large (a few hundred KB with a hundred slices) and never change once
their run has committed, so the pages ask for ids first and parse only records
they have not seen (see ``plumbwatch.api.page_cache``).
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import orjson
import sqlalchemy as sa

from plumbwatch.store.tables import evaluations, predictions


def latest_id(conn: sa.Connection, *, model_id: int) -> tuple[int, int] | None:
    """``(id, as_of_us)`` of the record that ``evaluations.latest`` returns, or None."""
    row = conn.execute(
        sa.select(evaluations.c.id, evaluations.c.as_of_us)
        .where(evaluations.c.model_id == model_id)
        .order_by(evaluations.c.as_of_us.desc(), evaluations.c.id.desc())
        .limit(1)
    ).first()
    return (int(row.id), int(row.as_of_us)) if row else None


def thinned_ids(
    conn: sa.Connection, *, model_id: int, since_us: int, slot_us: int
) -> list[tuple[int, int]]:
    """``(id, as_of_us)`` of the last run in each ``slot_us`` slot of as_of from
    ``since_us`` on, oldest first: a bounded number of points however often the
    model is evaluated."""
    slot = (evaluations.c.as_of_us - since_us) // slot_us
    last = (
        sa.select(sa.func.max(evaluations.c.id).label("id"))
        .where(evaluations.c.model_id == model_id, evaluations.c.as_of_us >= since_us)
        .group_by(slot)
        .subquery()
    )
    rows = conn.execute(
        sa.select(evaluations.c.id, evaluations.c.as_of_us)
        .where(evaluations.c.id.in_(sa.select(last.c.id)))
        .order_by(evaluations.c.as_of_us, evaluations.c.id)
    )
    return [(int(r.id), int(r.as_of_us)) for r in rows]


def records_by_id(conn: sa.Connection, ids: Iterable[int]) -> dict[int, dict[str, Any]]:
    wanted = sorted(set(ids))
    out: dict[int, dict[str, Any]] = {}
    for start in range(0, len(wanted), 500):
        chunk = wanted[start : start + 500]
        rows = conn.execute(
            sa.select(evaluations.c.id, evaluations.c.record).where(evaluations.c.id.in_(chunk))
        )
        out.update({int(r.id): orjson.loads(r.record) for r in rows})
    return out


def current_version(conn: sa.Connection, *, model_id: int) -> str | None:
    """The version of the model's most recent prediction (by predicted_at)."""
    return conn.execute(
        sa.select(predictions.c.version)
        .where(predictions.c.model_id == model_id)
        .order_by(predictions.c.predicted_at_us.desc())
        .limit(1)
    ).scalar_one_or_none()
