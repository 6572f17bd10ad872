"""Stored evidence: streams per (model, version, slice), their cursor, resets, baselines.

Unlike sketches, evidence is never rebuilt from raw rows: a stream must see each
row once, when it matures, with the value it had then (DESIGN.md "Evaluation
semantics"). A reset deletes a model's streams (they restart at E = 1) and keeps
a row saying who reset them and why.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from plumbwatch.store.tables import (
    baselines,
    evidence_cursors,
    evidence_resets,
    evidence_streams,
    sketches,
)

StreamKey = tuple[str, str]  # (version, slice)


@dataclass(frozen=True)
class EvidenceCursor:
    """Rows predicted at or before ``frontier_us`` with ids up to the seqs were fed."""

    as_of_us: int
    frontier_us: int
    prediction_seq: int
    outcome_seq: int
    revision_seq: int


@dataclass
class StoredStream:
    started_at_us: int
    since_frontier_us: int
    since_prediction_seq: int
    state: bytes
    cusum: str | None  # JSON, binary models only
    corrections: int = 0
    late_labels: int = 0
    last_predicted_at_us: int = 0


@dataclass(frozen=True)
class Reset:
    id: int
    reset_at_us: int
    reason: str
    actor: str


def get_cursor(conn: sa.Connection, *, model_id: int) -> EvidenceCursor | None:
    t = evidence_cursors.c
    row = conn.execute(sa.select(evidence_cursors).where(t.model_id == model_id)).first()
    if row is None:
        return None
    return EvidenceCursor(
        row.as_of_us, row.frontier_us, row.prediction_seq, row.outcome_seq, row.revision_seq
    )


def save_cursor(conn: sa.Connection, *, model_id: int, cursor: EvidenceCursor, now_us: int) -> None:
    values = {
        "as_of_us": cursor.as_of_us,
        "frontier_us": cursor.frontier_us,
        "prediction_seq": cursor.prediction_seq,
        "outcome_seq": cursor.outcome_seq,
        "revision_seq": cursor.revision_seq,
        "updated_at_us": now_us,
    }
    t = evidence_cursors.c
    done = conn.execute(sa.update(evidence_cursors).where(t.model_id == model_id).values(**values))
    if not done.rowcount:
        conn.execute(sa.insert(evidence_cursors).values(model_id=model_id, **values))


def load_streams(conn: sa.Connection, *, model_id: int) -> dict[StreamKey, StoredStream]:
    t = evidence_streams.c
    rows = conn.execute(sa.select(evidence_streams).where(t.model_id == model_id))
    return {
        (r.version, r.slice): StoredStream(
            r.started_at_us,
            r.since_frontier_us,
            r.since_prediction_seq,
            bytes(r.state),
            r.cusum,
            r.corrections,
            r.late_labels,
            r.last_predicted_at_us,
        )
        for r in rows
    }


def save_streams(
    conn: sa.Connection,
    *,
    model_id: int,
    streams: Mapping[StreamKey, StoredStream],
    existing: set[StreamKey],
    now_us: int,
) -> None:
    """Write streams back: update those in ``existing``, insert the others."""

    def params(key: StreamKey, s: StoredStream) -> dict[str, object]:
        return {
            "m": model_id,
            "v": key[0],
            "s": key[1],
            "started": s.started_at_us,
            "since_f": s.since_frontier_us,
            "since_p": s.since_prediction_seq,
            "state": s.state,
            "cusum": s.cusum,
            "corrections": s.corrections,
            "late": s.late_labels,
            "last": s.last_predicted_at_us,
            "at": now_us,
        }

    values: dict[str, Any] = {
        "started_at_us": sa.bindparam("started"),
        "since_frontier_us": sa.bindparam("since_f"),
        "since_prediction_seq": sa.bindparam("since_p"),
        "state": sa.bindparam("state"),
        "cusum": sa.bindparam("cusum"),
        "corrections": sa.bindparam("corrections"),
        "late_labels": sa.bindparam("late"),
        "last_predicted_at_us": sa.bindparam("last"),
        "updated_at_us": sa.bindparam("at"),
    }
    t = evidence_streams.c
    updates = [params(k, s) for k, s in streams.items() if k in existing]
    inserts = [params(k, s) for k, s in streams.items() if k not in existing]
    if updates:
        conn.execute(
            sa.update(evidence_streams)
            .where(
                t.model_id == sa.bindparam("m"),
                t.version == sa.bindparam("v"),
                t.slice == sa.bindparam("s"),
            )
            .values(**values),
            updates,
        )
    if inserts:
        conn.execute(
            sa.insert(evidence_streams).values(
                model_id=sa.bindparam("m"),
                version=sa.bindparam("v"),
                slice=sa.bindparam("s"),
                **values,
            ),
            inserts,
        )


def latest_reset(conn: sa.Connection, *, model_id: int) -> Reset | None:
    t = evidence_resets.c
    row = conn.execute(
        sa.select(evidence_resets).where(t.model_id == model_id).order_by(t.id.desc()).limit(1)
    ).first()
    return Reset(row.id, row.reset_at_us, row.reason, row.actor) if row else None


def reset(conn: sa.Connection, *, model_id: int, reason: str, actor: str, now_us: int) -> Reset:
    """Delete the model's streams (they restart at E = 1 on the next run); keep a record."""
    conn.execute(sa.delete(evidence_streams).where(evidence_streams.c.model_id == model_id))
    rid = conn.execute(
        sa.insert(evidence_resets)
        .values(model_id=model_id, reset_at_us=now_us, reason=reason, actor=actor)
        .returning(evidence_resets.c.id)
    ).scalar_one()
    return Reset(int(rid), now_us, reason, actor)


def load_baselines(conn: sa.Connection, *, model_id: int) -> dict[str, tuple[int, int]]:
    """Fixed baselines: version -> (first day, end day exclusive)."""
    t = baselines.c
    rows = conn.execute(sa.select(t.version, t.first_day, t.end_day).where(t.model_id == model_id))
    return {r.version: (r.first_day, r.end_day) for r in rows}


def add_baselines(
    conn: sa.Connection, *, model_id: int, fixed: Iterable[tuple[str, int, int]], now_us: int
) -> None:
    params = [
        {"model_id": model_id, "version": v, "first_day": a, "end_day": b, "fixed_at_us": now_us}
        for v, a, b in fixed
    ]
    if params:
        conn.execute(sa.insert(baselines), params)


def first_days(conn: sa.Connection, *, model_id: int) -> dict[str, int]:
    """The first cohort day with matured rows of each version (from the sketches)."""
    t = sketches.c
    rows = conn.execute(
        sa.select(t.version, sa.func.min(t.day))
        .where(t.model_id == model_id, t.slice == "overall")
        .group_by(t.version)
    )
    return {v: int(d) for v, d in rows}
