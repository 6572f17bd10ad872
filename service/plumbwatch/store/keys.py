"""Client-id lookup through compact 64-bit hashes, in two tiers.

Real pipelines send random UUIDs. A unique index on the id text puts every new
row on a random index page, so each commit rewrites about one page per row (on
SQLite the whole page goes to the WAL). Instead each id is reduced to a 64-bit
BLAKE2b hash and written to ``row_keys_recent``, a table small enough that the
pages a commit dirties are few; from time to time :func:`settle` moves the
recent tier into ``row_keys`` in hash order, touching each settled page about
once per move instead of once per row.

PostgreSQL logs row changes, not whole pages, at each commit, so there the
recent tier buys nothing and costs a second probe per id, a DELETE per moved
key (dead rows the lookups wade through until vacuum) and, worse, plans made on
the statistics of a table that swings between empty and full (a lookup of 2,000
ids took 20 s at 1M rows): keys go straight into ``row_keys``, and only that
tier is read (migration 0005 moved the recent tier into it).

Keys are ordered (model, hash, kind, row): one probe finds whether an id is
stored as a prediction, an outcome or both. A hash only narrows the search:
callers always compare the stored id text, so a collision can never merge two
different ids. Uniqueness comes from the writer: check and insert run inside one
write transaction (SQLite's write lock; on PostgreSQL a per-model advisory lock,
see :func:`lock_model`).
"""

from __future__ import annotations

import hashlib
from collections import defaultdict
from collections.abc import Iterable, Iterator, Sequence
from itertools import chain
from typing import Any

import orjson
import sqlalchemy as sa

from plumbwatch.store.tables import row_keys, row_keys_recent

LOOKUP_CHUNK = 2_000
INSERT_ROWS = 500  # x 9 columns stays well under SQLite's 32,766 parameters
_LOCK_NAMESPACE = 0x706C  # first key of pg_advisory_xact_lock(ns, model_id)


def id_hash(client_id: str) -> int:
    digest = hashlib.blake2b(client_id.encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big", signed=True)


def id_hashes(client_ids: Iterable[str]) -> list[int]:
    """``id_hash`` of each id (the same values, with the lookups hoisted out of the loop)."""
    blake2b, from_bytes = hashlib.blake2b, int.from_bytes
    return [
        from_bytes(blake2b(c.encode("utf-8"), digest_size=8).digest(), "big", signed=True)
        for c in client_ids
    ]


def lock_model(conn: sa.Connection, model_id: int) -> None:
    """Serialise writers of one model across PostgreSQL servers (no-op on SQLite,
    where the write transaction already holds the database's write lock)."""
    if conn.dialect.name == "postgresql":
        # Advisory locks are per database: the schema's name keeps two plumbwatch
        # schemas in one database (tests, staging beside production) apart.
        conn.execute(
            sa.text("SELECT pg_advisory_xact_lock(hashtext(current_schema()) # :ns, :model)"),
            {"ns": _LOCK_NAMESPACE, "model": model_id},
        )


def placeholder(conn: sa.Connection) -> str:
    """The DBAPI parameter marker, for statements sent through ``exec_driver_sql``."""
    return "?" if conn.dialect.name == "sqlite" else "%s"


def any_of(conn: sa.Connection, column: str, values: Sequence[int]) -> tuple[str, tuple[Any, ...]]:
    """SQL matching an integer column against values, with its parameters.

    Ingest runs this for every row, so it bypasses statement compilation: one
    array parameter on PostgreSQL, plain markers on SQLite (callers chunk). The
    array goes as its text form: psycopg would adapt a list of ints element by
    element in Python, which cost more than the lookup itself.
    """
    if conn.dialect.name == "postgresql":
        return f"{column} = ANY(%s::bigint[])", (array_literal(values),)
    return f"{column} IN ({','.join('?' * len(values))})", tuple(values)


def array_literal(values: Iterable[int]) -> str:
    """A PostgreSQL array literal of integers, e.g. ``{1,-2,3}``."""
    return "{" + ",".join(map(str, values)) + "}"


def chunked(values: Sequence[int], conn: sa.Connection) -> Iterator[Sequence[int]]:
    # SQLite allows 32,766 parameters per statement. PostgreSQL takes any array, but
    # past a few thousand values its planner turns index probes into table scans.
    for start in range(0, len(values), LOOKUP_CHUNK):
        yield values[start : start + LOOKUP_CHUNK]


def select_exact(
    conn: sa.Connection, columns: Sequence[str], source: str, params: Sequence[Any]
) -> list[Sequence[Any]]:
    """The rows of ``source`` (a SELECT of ``columns``): integer and text columns only.

    On SQLite the rows come back as one JSON array: the sqlite3 module steps once
    per result row and gives up the GIL around each step, so a thousand-row result
    meant a thousand waits for the GIL while request threads parse JSON. Floats
    must not come this way (SQLite's JSON writes 15 significant digits).
    """
    if conn.dialect.name != "sqlite":
        return list(conn.exec_driver_sql(source, tuple(params)))
    names = ", ".join(columns)
    packed = conn.exec_driver_sql(
        f"SELECT json_group_array(json_array({names})) FROM ({source})", tuple(params)
    ).scalar_one()
    rows: list[Sequence[Any]] = orjson.loads(packed)
    return rows


def lookup(
    conn: sa.Connection, *, model_id: int, hashes: Sequence[int]
) -> dict[int, list[tuple[str, int]]]:
    """(kind, row id) pairs stored under each hash, from every tier in use (one statement,
    one snapshot). Keys are ordered hash before kind, so one probe finds both kinds."""
    found: dict[int, list[tuple[str, int]]] = defaultdict(list)
    mark = placeholder(conn)
    tiers = [row_keys.name]
    if uses_recent_tier(conn.dialect.name):
        tiers.append(row_keys_recent.name)
    for chunk in chunked(sorted(set(hashes)), conn):
        where, params = any_of(conn, "id_hash", chunk)
        sql = " UNION ALL ".join(
            f"SELECT id_hash, kind, row_id FROM {table} WHERE model_id = {mark} AND {where}"
            for table in tiers
        )
        columns = ("id_hash", "kind", "row_id")
        for h, kind, row_id in select_exact(conn, columns, sql, (model_id, *params) * len(tiers)):
            found[h].append((kind, row_id))
    return found


def uses_recent_tier(dialect: str) -> bool:
    """Whether new keys go to the recent tier (SQLite) or straight to the settled one."""
    return dialect != "postgresql"


def add(conn: sa.Connection, *, model_id: int, kind: str, pairs: Iterable[tuple[int, int]]) -> int:
    """Record (hash, row id) pairs (SQLite: in the recent tier); returns how many."""
    rows = sorted((model_id, h, kind, row_id) for h, row_id in pairs)  # key order: fewer pages
    if rows:
        table = row_keys_recent if uses_recent_tier(conn.dialect.name) else row_keys
        insert_rows(conn, table.name, ("model_id", "id_hash", "kind", "row_id"), rows)
    return len(rows)


def insert_rows(
    conn: sa.Connection, table: str, columns: Sequence[str], rows: Sequence[tuple[Any, ...]]
) -> None:
    """Bulk insert plain tuples inside the caller's transaction, at driver speed.

    PostgreSQL: COPY on the same connection (so the same transaction and
    savepoint). SQLite: multi-row ``INSERT ... VALUES``, ``INSERT_ROWS`` rows per
    statement. Not ``executemany``: it steps once per row and releases the GIL
    around each step, so while request threads validate JSON the writer waits for
    the GIL a thousand times per batch.
    """
    names = ", ".join(columns)
    if conn.dialect.name == "postgresql":
        cursor = conn.connection.driver_connection.cursor()  # type: ignore[union-attr]
        with cursor.copy(f"COPY {table} ({names}) FROM STDIN") as copy:
            for row in rows:
                copy.write_row(row)
        cursor.close()
        return
    one = "(" + ", ".join("?" * len(columns)) + ")"
    for start in range(0, len(rows), INSERT_ROWS):
        chunk = rows[start : start + INSERT_ROWS]
        values = ", ".join([one] * len(chunk))
        params = tuple(chain.from_iterable(chunk))
        conn.exec_driver_sql(f"INSERT INTO {table} ({names}) VALUES {values}", params)


def recent_count(conn: sa.Connection) -> int:
    return int(conn.execute(sa.select(sa.func.count()).select_from(row_keys_recent)).scalar_one())


def settle(conn: sa.Connection) -> int:
    """Move the recent tier into the settled one, in key order. Returns rows moved."""
    columns = "model_id, id_hash, kind, row_id"  # the primary key's order
    if conn.dialect.name == "postgresql":
        # One statement: rows another server adds meanwhile stay in the recent tier.
        result = conn.execute(
            sa.text(
                f"WITH moved AS (DELETE FROM row_keys_recent RETURNING {columns}) "
                f"INSERT INTO row_keys ({columns}) SELECT {columns} FROM moved "
                f"ORDER BY {columns}"
            )
        )
        return int(result.rowcount or 0)
    moved = conn.execute(
        sa.text(
            f"INSERT INTO row_keys ({columns}) SELECT {columns} FROM row_keys_recent "
            f"ORDER BY {columns}"
        )
    ).rowcount
    conn.execute(sa.text("DELETE FROM row_keys_recent"))
    return int(moved or 0)


def allocate_ids(conn: sa.Connection, table: sa.Table, n: int) -> list[int]:
    """Primary keys for n new rows, so that inserts need no RETURNING round trip.

    SQLite: the caller holds the write lock, so max(id) is stable. PostgreSQL: the
    table's sequence hands out ids that no other server will get.
    """
    if n == 0:
        return []
    if conn.dialect.name == "postgresql":
        # One row holding an array: a thousand result rows cost more than the nextvals.
        ids = conn.exec_driver_sql(
            "SELECT array_agg(nextval(pg_get_serial_sequence(%s, 'id'))) "
            "FROM generate_series(1, %s)",
            (table.name, n),
        ).scalar_one()
        return sorted(ids)
    first = conn.exec_driver_sql(f"SELECT coalesce(max(id), 0) + 1 FROM {table.name}").scalar_one()
    return list(range(int(first), int(first) + n))
