"""Evaluation records (the history) and leases."""

from __future__ import annotations

from typing import Any

import orjson
import sqlalchemy as sa

from plumbwatch.store.tables import evaluations, leases


def create(
    conn: sa.Connection,
    *,
    model_id: int,
    as_of_us: int,
    evaluated_at_us: int,
    health: str,
    record: dict[str, Any],
) -> int:
    result = conn.execute(
        sa.insert(evaluations)
        .values(
            model_id=model_id,
            as_of_us=as_of_us,
            evaluated_at_us=evaluated_at_us,
            health=health,
            record=orjson.dumps(record).decode(),
        )
        .returning(evaluations.c.id)
    )
    return int(result.scalar_one())


def update_record(
    conn: sa.Connection, *, evaluation_id: int, health: str, record: dict[str, Any]
) -> None:
    conn.execute(
        sa.update(evaluations)
        .where(evaluations.c.id == evaluation_id)
        .values(health=health, record=orjson.dumps(record).decode())
    )


def latest(conn: sa.Connection, *, model_id: int) -> dict[str, Any] | None:
    row = conn.execute(
        sa.select(evaluations.c.record)
        .where(evaluations.c.model_id == model_id)
        .order_by(evaluations.c.as_of_us.desc(), evaluations.c.id.desc())
        .limit(1)
    ).first()
    return orjson.loads(row.record) if row else None


def latest_as_of(conn: sa.Connection, *, model_id: int) -> int | None:
    value = conn.execute(
        sa.select(sa.func.max(evaluations.c.as_of_us)).where(evaluations.c.model_id == model_id)
    ).scalar_one()
    return int(value) if value is not None else None


def list_records(
    conn: sa.Connection,
    *,
    model_id: int,
    since_us: int | None = None,
    until_us: int | None = None,
    after_id: int | None = None,
    limit: int = 100,
) -> list[tuple[int, dict[str, Any]]]:
    query = sa.select(evaluations.c.id, evaluations.c.record).where(
        evaluations.c.model_id == model_id
    )
    if since_us is not None:
        query = query.where(evaluations.c.as_of_us >= since_us)
    if until_us is not None:
        query = query.where(evaluations.c.as_of_us < until_us)
    if after_id is not None:
        query = query.where(evaluations.c.id > after_id)
    rows = conn.execute(query.order_by(evaluations.c.id).limit(limit))
    return [(r.id, orjson.loads(r.record)) for r in rows]


def acquire_lease(conn: sa.Connection, *, name: str, holder: str, now_us: int, ttl_us: int) -> bool:
    """Take or renew the lease ``name`` unless another holder has it unexpired.

    Runs in its own short transaction (the caller commits), so that the row-level
    update or insert decides between racing servers.
    """
    expires = now_us + ttl_us
    taken = conn.execute(
        sa.update(leases)
        .where(
            leases.c.name == name,
            sa.or_(leases.c.holder == holder, leases.c.expires_at_us <= now_us),
        )
        .values(holder=holder, expires_at_us=expires)
    ).rowcount
    if taken:
        return True
    try:
        with conn.begin_nested():
            conn.execute(sa.insert(leases).values(name=name, holder=holder, expires_at_us=expires))
    except sa.exc.IntegrityError:
        return False
    return True


def release_lease(conn: sa.Connection, *, name: str, holder: str) -> None:
    conn.execute(sa.delete(leases).where(leases.c.name == name, leases.c.holder == holder))
