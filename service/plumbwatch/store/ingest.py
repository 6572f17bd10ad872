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
from plumbwatch.store.tables import (
    outcome_revisions,
    outcomes,
    predictions,
    row_keys,
    row_keys_recent,
)
from plumbwatch.validation import OutcomeRow, PredictionRow

_PREDICTION_COLUMNS = (
    "id",
    "model_id",
    "client_id",
    "predicted_at_us",
    "probability",
    "probabilities",
    "version",
    "segments",
    "received_at_us",
)
_OUTCOME_COLUMNS = (
    "id",
    "model_id",
    "client_id",
    "prediction_id",
    "outcome",
    "observed_at_us",
    "received_at_us",
    "revision",
)


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


def _existing(
    conn: sa.Connection,
    table: sa.Table,
    columns: Sequence[str],
    *,
    model_id: int,
    kind: str,
    client_ids: Sequence[str],
    hashes: Sequence[int],
) -> dict[str, sa.Row[Any]]:
    """Stored rows of this model whose client id is among client_ids.

    One statement per chunk joins both key tiers to the table (one snapshot), sent
    as plain SQL: ingest runs it for every batch, and statement compilation with
    thousands of bound values cost more than the lookup itself.
    """
    mark = keys.placeholder(conn)
    select = ", ".join(f"t.{c}" for c in ("id", "client_id", *columns))
    found: dict[str, sa.Row[Any]] = {}
    wanted = set(client_ids)
    for chunk in keys.chunked(sorted(set(hashes)), conn):
        where, params = keys.hash_filter(conn, chunk)
        sql = " UNION ALL ".join(
            f"SELECT {select} FROM {tier.name} k JOIN {table.name} t ON t.id = k.row_id "
            f"WHERE k.model_id = {mark} AND k.kind = {mark} AND k.{where}"
            for tier in (row_keys, row_keys_recent)
        )
        for row in conn.exec_driver_sql(sql, (model_id, kind, *params, model_id, kind, *params)):
            if row.client_id in wanted:
                found[row.client_id] = row
    return found


def write_predictions(
    conn: sa.Connection, *, model_id: int, rows: Sequence[PredictionRow], now_us: int
) -> PredictionsWritten:
    keys.lock_model(conn, model_id)
    hashes = [keys.id_hash(r.client_id) for r in rows]
    stored = _existing(
        conn,
        predictions,
        ["predicted_at_us", "probability", "probabilities", "version", "segments"],
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
                    index=row.position,
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
        keys.insert_rows(
            conn,
            predictions.name,
            _PREDICTION_COLUMNS,
            [
                (
                    rid,
                    model_id,
                    r.client_id,
                    r.predicted_at_us,
                    r.probability,
                    r.probabilities,
                    r.version,
                    r.segments,
                    now_us,
                )
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
        ["prediction_id"],
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
    stored = _existing(
        conn,
        outcomes,
        ["outcome", "observed_at_us", "received_at_us", "prediction_id", "revision"],
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
                    index=row.position,
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
                (
                    rid,
                    model_id,
                    r.client_id,
                    pred.id if pred is not None else None,
                    r.outcome,
                    r.observed_at_us,
                    now_us,
                    0,
                )
            )
        keys.insert_rows(conn, outcomes.name, _OUTCOME_COLUMNS, params)
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
