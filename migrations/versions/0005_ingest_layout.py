"""ingest layout: row keys ordered by hash before kind; no foreign keys on raw rows

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02

1. The id-key tables were keyed (model_id, kind, id_hash, row_id): finding whether a
   client id is stored as a prediction and as an outcome took two index probes per
   tier. Keyed (model_id, id_hash, kind, row_id), one probe finds both, which halves
   the index work of every ingested row (see plumbwatch.store.keys). On PostgreSQL
   the recent tier is moved into the settled one: it is no longer used there.
2. predictions.model_id, outcomes.model_id and outcomes.prediction_id lose their
   foreign keys. The group writer is the only code that writes these columns, from
   rows it has just read inside the model's write lock, and models are archived,
   never deleted. On PostgreSQL each checked row ran a trigger query that also
   locked the parent row (FOR KEY SHARE: every outcome wrote to its prediction's
   page, every batch of every server locked the same model row); the checks cost
   about as much as the COPY itself. SQLite drops them with the documented
   writable_schema procedure for removing constraints (no table rebuild).
"""

from __future__ import annotations

import re
from collections.abc import Callable

from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

_KEY_TABLES = ("row_keys", "row_keys_recent")
_OLD_KEY = ("model_id", "kind", "id_hash", "row_id")
_NEW_KEY = ("model_id", "id_hash", "kind", "row_id")
# (table, constraint, column, referred table)
_FOREIGN_KEYS = (
    ("predictions", "fk_predictions_model_id_monitored_models", "model_id", "monitored_models"),
    ("outcomes", "fk_outcomes_model_id_monitored_models", "model_id", "monitored_models"),
    ("outcomes", "fk_outcomes_prediction_id_predictions", "prediction_id", "predictions"),
)


def _sqlite() -> bool:
    return op.get_bind().dialect.name == "sqlite"


def _rekey(table: str, columns: tuple[str, ...]) -> None:
    if _sqlite():
        # A WITHOUT ROWID table is its primary key: rebuild it, copying in key order.
        names = ", ".join(columns)
        op.execute(
            f"CREATE TABLE {table}_rekeyed (model_id INTEGER NOT NULL, kind VARCHAR(1) NOT NULL, "
            f"id_hash BIGINT NOT NULL, row_id BIGINT NOT NULL, "
            f"CONSTRAINT pk_{table} PRIMARY KEY ({names})) WITHOUT ROWID"
        )
        op.execute(
            f"INSERT INTO {table}_rekeyed (model_id, kind, id_hash, row_id) "
            f"SELECT model_id, kind, id_hash, row_id FROM {table} ORDER BY {names}"
        )
        op.execute(f"DROP TABLE {table}")
        op.execute(f"ALTER TABLE {table}_rekeyed RENAME TO {table}")
    else:
        op.drop_constraint(f"pk_{table}", table, type_="primary")
        op.create_primary_key(f"pk_{table}", table, list(columns))


def _sqlite_table_sql(edit: dict[str, Callable[[str], str]]) -> None:
    """Rewrite CREATE TABLE texts in the schema table (https://sqlite.org/lang_altertable.html,
    "making other kinds of table schema changes": removing or adding constraints)."""
    conn = op.get_bind()
    version = conn.exec_driver_sql("PRAGMA schema_version").scalar_one()
    conn.exec_driver_sql("PRAGMA writable_schema=ON")
    for table, change in edit.items():
        sql = conn.exec_driver_sql(
            "SELECT sql FROM sqlite_master WHERE type = 'table' AND name = ?", (table,)
        ).scalar_one()
        conn.exec_driver_sql(
            "UPDATE sqlite_master SET sql = ? WHERE type = 'table' AND name = ?",
            (change(sql), table),
        )
    conn.exec_driver_sql(f"PRAGMA schema_version={int(version) + 1}")
    conn.exec_driver_sql("PRAGMA writable_schema=OFF")


def _without(names: list[str]) -> Callable[[str], str]:
    def change(sql: str) -> str:
        for name in names:
            sql, n = re.subn(
                rf",\s*CONSTRAINT {name} FOREIGN KEY\s*\([a-z_]+\)\s*REFERENCES [a-z_]+ \(id\)",
                "",
                sql,
            )
            if n != 1:
                raise RuntimeError(f"foreign key {name} not found in: {sql}")
        return sql

    return change


def _with(keys: list[tuple[str, str, str]]) -> Callable[[str], str]:
    def change(sql: str) -> str:
        head, _, _ = sql.rpartition(")")
        added = "".join(
            f", \n\tCONSTRAINT {name} FOREIGN KEY({column}) REFERENCES {referred} (id)"
            for name, column, referred in keys
        )
        return f"{head.rstrip()}{added}\n)"

    return change


def upgrade() -> None:
    for table in _KEY_TABLES:
        _rekey(table, _NEW_KEY)
    if not _sqlite():
        # PostgreSQL reads and writes only the settled tier from now on (store/keys.py).
        columns = ", ".join(_NEW_KEY)
        op.execute(
            f"INSERT INTO row_keys ({columns}) SELECT {columns} FROM row_keys_recent "
            f"ORDER BY {columns}"
        )
        op.execute("DELETE FROM row_keys_recent")
    if _sqlite():
        tables = sorted({t for t, *_ in _FOREIGN_KEYS})
        _sqlite_table_sql(
            {t: _without([name for tt, name, *_ in _FOREIGN_KEYS if tt == t]) for t in tables}
        )
    else:
        for table, name, _, _ in _FOREIGN_KEYS:
            op.drop_constraint(name, table, type_="foreignkey")


def downgrade() -> None:
    if _sqlite():
        tables = sorted({t for t, *_ in _FOREIGN_KEYS})
        _sqlite_table_sql(
            {t: _with([(n, c, r) for tt, n, c, r in _FOREIGN_KEYS if tt == t]) for t in tables}
        )
    else:
        for table, name, column, referred in _FOREIGN_KEYS:
            op.create_foreign_key(name, table, referred, [column], ["id"])
    for table in _KEY_TABLES:
        _rekey(table, _OLD_KEY)
