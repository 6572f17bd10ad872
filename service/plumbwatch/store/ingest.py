"""Writing predictions and outcomes: idempotent, conflict-checked, all or nothing.

Each function runs inside the caller's write transaction and either applies the
whole batch or raises before writing anything it cannot keep (the writer wraps
each batch in a savepoint, so a raise leaves no trace).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from plumbwatch.errors import Conflict, Detail
from plumbwatch.store import keys
from plumbwatch.store.tables import outcome_revisions, outcomes, predictions
from plumbwatch.validation import OutcomeRow, PredictionRow

_FETCH_CHUNK = 500


@dataclass(frozen=True)
class PredictionsWritten:
    accepted: int
    duplicates: int


@dataclass(frozen=True)
class OutcomesWritten:
    accepted: int
    duplicates: int
    corrections: int
    awaiting_prediction: int


def _fetch(
    conn: sa.Connection,
    table: sa.Table,
    columns: Sequence[sa.ColumnElement[Any]],
    ids: Sequence[int],
) -> dict[int, sa.Row[Any]]:
    out: dict[int, sa.Row[Any]] = {}
    unique = sorted(set(ids))
    for start in range(0, len(unique), _FETCH_CHUNK):
        chunk = unique[start : start + _FETCH_CHUNK]
        for row in conn.execute(sa.select(table.c.id, *columns).where(table.c.id.in_(chunk))):
            out[row.id] = row
    return out


def _existing(
    conn: sa.Connection,
    table: sa.Table,
    columns: Sequence[sa.ColumnElement[Any]],
    *,
    model_id: int,
    kind: str,
    client_ids: Sequence[str],
    hashes: Sequence[int],
) -> dict[str, sa.Row[Any]]:
    """Stored rows of this model whose client id is among client_ids."""
    hits = keys.lookup(conn, model_id=model_id, kind=kind, hashes=hashes)
    if not hits:
        return {}
    candidates = [rid for rids in hits.values() for rid in rids]
    rows = _fetch(conn, table, [table.c.client_id, *columns], candidates)
    wanted = set(client_ids)
    return {r.client_id: r for r in rows.values() if r.client_id in wanted}


def write_predictions(
    conn: sa.Connection, *, model_id: int, rows: Sequence[PredictionRow], now_us: int
) -> PredictionsWritten:
    keys.lock_model(conn, model_id)
    hashes = [keys.id_hash(r.client_id) for r in rows]
    p = predictions.c
    stored = _existing(
        conn,
        predictions,
        [p.predicted_at_us, p.probability, p.probabilities, p.version, p.segments],
        model_id=model_id,
        kind="p",
        client_ids=[r.client_id for r in rows],
        hashes=hashes,
    )
    conflicts: list[Detail] = []
    new: list[tuple[PredictionRow, int]] = []
    duplicates = 0
    for row, h in zip(rows, hashes, strict=True):
        old = stored.get(row.client_id)
        if old is None:
            new.append((row, h))
        elif (
            old.predicted_at_us,
            old.probability,
            old.probabilities,
            old.version,
            old.segments,
        ) == (row.predicted_at_us, row.probability, row.probabilities, row.version, row.segments):
            duplicates += 1
        else:
            conflicts.append(
                Detail(
                    field="id",
                    index=row.index,
                    reason=f"{row.client_id!r} is stored with different content",
                )
            )
    if conflicts:
        raise Conflict(
            f"{len(conflicts)} ids are already stored with different content; nothing was stored",
            conflicts,
        )
    ids = keys.allocate_ids(conn, predictions, len(new))
    if new:
        conn.execute(
            sa.insert(predictions),
            [
                {
                    "id": rid,
                    "model_id": model_id,
                    "client_id": r.client_id,
                    "predicted_at_us": r.predicted_at_us,
                    "probability": r.probability,
                    "probabilities": r.probabilities,
                    "version": r.version,
                    "segments": r.segments,
                    "received_at_us": now_us,
                }
                for rid, (r, _) in zip(ids, new, strict=True)
            ],
        )
        keys.add(
            conn,
            model_id=model_id,
            kind="p",
            pairs=((h, rid) for rid, (_, h) in zip(ids, new, strict=True)),
        )
        _link_waiting_outcomes(
            conn,
            model_id=model_id,
            new=[(r.client_id, h, rid) for rid, (r, h) in zip(ids, new, strict=True)],
        )
    return PredictionsWritten(accepted=len(new), duplicates=duplicates)


def _link_waiting_outcomes(
    conn: sa.Connection, *, model_id: int, new: Sequence[tuple[str, int, int]]
) -> None:
    """Join outcomes that arrived before their prediction to the new prediction rows."""
    waiting = _existing(
        conn,
        outcomes,
        [outcomes.c.prediction_id],
        model_id=model_id,
        kind="o",
        client_ids=[c for c, _, _ in new],
        hashes=[h for _, h, _ in new],
    )
    if not waiting:
        return
    links = [
        {"oid": waiting[c].id, "pid": rid}
        for c, _, rid in new
        if c in waiting and waiting[c].prediction_id is None
    ]
    if links:
        conn.execute(
            sa.update(outcomes)
            .where(outcomes.c.id == sa.bindparam("oid"))
            .values(prediction_id=sa.bindparam("pid")),
            links,
        )


def write_outcomes(
    conn: sa.Connection,
    *,
    model_id: int,
    rows: Sequence[OutcomeRow],
    now_us: int,
    correction: bool,
) -> OutcomesWritten:
    keys.lock_model(conn, model_id)
    hashes = [keys.id_hash(r.client_id) for r in rows]
    client_ids = [r.client_id for r in rows]
    o = outcomes.c
    stored = _existing(
        conn,
        outcomes,
        [o.outcome, o.observed_at_us, o.received_at_us, o.prediction_id, o.revision],
        model_id=model_id,
        kind="o",
        client_ids=client_ids,
        hashes=hashes,
    )
    conflicts: list[Detail] = []
    new: list[tuple[OutcomeRow, int]] = []
    changed: list[tuple[OutcomeRow, sa.Row[Any]]] = []
    duplicates = awaiting = 0
    for row, h in zip(rows, hashes, strict=True):
        old = stored.get(row.client_id)
        if old is None:
            new.append((row, h))
            continue
        if old.prediction_id is None:
            awaiting += 1
        if old.outcome == row.outcome:
            duplicates += 1
        elif correction:
            changed.append((row, old))
        else:
            conflicts.append(
                Detail(
                    field="outcome",
                    index=row.index,
                    reason=f"{row.client_id!r} has a stored outcome with another value; "
                    "send it with ?correction=true to correct it",
                )
            )
    if conflicts:
        raise Conflict(
            f"{len(conflicts)} outcomes differ from stored values; nothing was stored",
            conflicts,
        )
    if changed:
        _apply_corrections(conn, changed, now_us=now_us)
    if new:
        predicted = _existing(
            conn,
            predictions,
            [],
            model_id=model_id,
            kind="p",
            client_ids=[r.client_id for r, _ in new],
            hashes=[h for _, h in new],
        )
        ids = keys.allocate_ids(conn, outcomes, len(new))
        params = []
        for rid, (r, _) in zip(ids, new, strict=True):
            pred = predicted.get(r.client_id)
            if pred is None:
                awaiting += 1
            params.append(
                {
                    "id": rid,
                    "model_id": model_id,
                    "client_id": r.client_id,
                    "prediction_id": pred.id if pred is not None else None,
                    "outcome": r.outcome,
                    "observed_at_us": r.observed_at_us,
                    "received_at_us": now_us,
                    "revision": 0,
                }
            )
        conn.execute(sa.insert(outcomes), params)
        keys.add(
            conn,
            model_id=model_id,
            kind="o",
            pairs=((h, rid) for rid, (_, h) in zip(ids, new, strict=True)),
        )
    return OutcomesWritten(
        accepted=len(new),
        duplicates=duplicates,
        corrections=len(changed),
        awaiting_prediction=awaiting,
    )


def _apply_corrections(
    conn: sa.Connection, changed: Sequence[tuple[OutcomeRow, sa.Row[Any]]], *, now_us: int
) -> None:
    """Keep each superseded value with its times, then store the correction."""
    conn.execute(
        sa.insert(outcome_revisions),
        [
            {
                "outcome_id": old.id,
                "outcome": old.outcome,
                "observed_at_us": old.observed_at_us,
                "received_at_us": old.received_at_us,
                "superseded_at_us": now_us,
            }
            for _, old in changed
        ],
    )
    conn.execute(
        sa.update(outcomes)
        .where(outcomes.c.id == sa.bindparam("oid"))
        .values(
            outcome=sa.bindparam("new_outcome"),
            observed_at_us=sa.bindparam("new_observed"),
            received_at_us=sa.bindparam("new_received"),
            revision=outcomes.c.revision + 1,
        ),
        [
            {
                "oid": old.id,
                "new_outcome": row.outcome,
                "new_observed": row.observed_at_us,
                "new_received": now_us,
            }
            for row, old in changed
        ],
    )
