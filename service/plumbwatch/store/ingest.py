"""Writing predictions and outcomes: idempotent, conflict-checked, all or nothing.

Each function runs inside the caller's write transaction and either applies the
whole batch or raises before writing anything it cannot keep (the writer wraps
each batch in a savepoint, so a raise leaves no trace).
"""

from __future__ import annotations

from collections import namedtuple
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import sqlalchemy as sa

from plumbwatch.errors import Conflict, Detail
from plumbwatch.store import keys
from plumbwatch.store.tables import outcome_revisions, outcomes, predictions
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
# write_predictions builds each new row as (id, model_id, *row[1:], received_at_us).
assert PredictionRow._fields[1:] == _PREDICTION_COLUMNS[2:-1]
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


class _Keys:
    """Where the batch's ids are stored: row ids by kind and hash, from one key lookup."""

    def __init__(self, conn: sa.Connection, *, model_id: int, hashes: Sequence[int]) -> None:
        self._found = keys.lookup(conn, model_id=model_id, hashes=hashes)

    def row_ids(self, kind: str, hashes: Sequence[int] | None = None) -> list[int]:
        """Row ids of this kind stored under the given hashes (None: any of the batch)."""
        found = self._found
        pairs = found.values() if hashes is None else (found[h] for h in hashes if h in found)
        return [row_id for group in pairs for k, row_id in group if k == kind]


def _fetch(
    conn: sa.Connection,
    table: sa.Table,
    columns: Sequence[str],
    *,
    row_ids: Sequence[int],
    client_ids: set[str],
) -> dict[str, Any]:
    """Rows by primary key (with attributes ``id``, ``client_id`` and ``columns``), by
    client id, for the client ids asked.

    A hash only narrows the search: keying by the stored id text here is what keeps
    two different ids that share a hash apart. Plain SQL, as for the key lookup.
    """
    found: dict[str, Any] = {}
    if not row_ids:
        return found
    names = ("id", "client_id", *columns)
    stored = _stored_row(names)
    exact = not any(isinstance(table.c[c].type, sa.Float) for c in columns)
    for chunk in keys.chunked(sorted(set(row_ids)), conn):
        where, params = keys.any_of(conn, "id", chunk)
        sql = f"SELECT {', '.join(names)} FROM {table.name} WHERE {where}"
        rows = (
            keys.select_exact(conn, names, sql, params)
            if exact
            else conn.exec_driver_sql(sql, params)
        )
        for values in rows:
            row = stored._make(values)
            if row.client_id in client_ids:
                found[row.client_id] = row
    return found


@lru_cache(maxsize=16)
def _stored_row(names: tuple[str, ...]) -> Any:
    return namedtuple("StoredRow", names)


def write_predictions(
    conn: sa.Connection,
    *,
    model_id: int,
    rows: Sequence[PredictionRow],
    now_us: int,
    hashes: Sequence[int] | None = None,
) -> PredictionsWritten:
    """``hashes``: ``keys.id_hashes`` of the rows' client ids, if the caller has them
    (the API computes them before queueing, off the single writer thread)."""
    keys.lock_model(conn, model_id)
    if hashes is None:
        hashes = keys.id_hashes(r.client_id for r in rows)
    found = _Keys(conn, model_id=model_id, hashes=hashes)
    stored = _fetch(
        conn,
        predictions,
        ["predicted_at_us", "probability", "probabilities", "version", "segments"],
        row_ids=found.row_ids("p"),
        client_ids={r.client_id for r in rows},
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
            # A row's fields after its position are the stored columns, in order.
            [(rid, model_id, *r[1:], now_us) for rid, (r, _) in zip(ids, new, strict=True)],
        )
        keys.add(
            conn,
            model_id=model_id,
            kind="p",
            pairs=((h, rid) for rid, (_, h) in zip(ids, new, strict=True)),
        )
        waiting = found.row_ids("o")
        if waiting:
            _link_waiting_outcomes(
                conn,
                waiting=waiting,
                new={r.client_id: rid for rid, (r, _) in zip(ids, new, strict=True)},
            )
    return PredictionsWritten(accepted=len(new), duplicates=duplicates)


def _link_waiting_outcomes(
    conn: sa.Connection, *, waiting: Sequence[int], new: dict[str, int]
) -> None:
    """Join outcomes that arrived before their prediction to the new prediction rows.

    ``waiting``: outcome rows whose key matched a hash of the batch; ``new``: the new
    predictions' row ids by client id.
    """
    outcome_rows = _fetch(conn, outcomes, ["prediction_id"], row_ids=waiting, client_ids=set(new))
    links = [
        {"oid": row.id, "pid": new[client_id]}
        for client_id, row in outcome_rows.items()
        if row.prediction_id is None
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
    hashes: Sequence[int] | None = None,
) -> OutcomesWritten:
    keys.lock_model(conn, model_id)
    if hashes is None:
        hashes = keys.id_hashes(r.client_id for r in rows)
    found = _Keys(conn, model_id=model_id, hashes=hashes)
    stored = _fetch(
        conn,
        outcomes,
        ["outcome", "observed_at_us", "received_at_us", "prediction_id", "revision"],
        row_ids=found.row_ids("o"),
        client_ids={r.client_id for r in rows},
    )
    conflicts: list[Detail] = []
    new: list[tuple[OutcomeRow, int]] = []
    changed: list[tuple[OutcomeRow, Any]] = []
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
        predicted = _fetch(
            conn,
            predictions,
            [],
            row_ids=found.row_ids("p", [h for _, h in new]),
            client_ids={r.client_id for r, _ in new},
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
    conn: sa.Connection, changed: Sequence[tuple[OutcomeRow, Any]], *, now_us: int
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
