"""row keys ordered by hash before kind

Revision ID: 0005
Revises: 0002
Create Date: 2026-12-02

The id-key tables were keyed (model_id, kind, id_hash, row_id): finding whether a
client id is stored as a prediction and as an outcome took two index probes per
tier. Keyed (model_id, id_hash, kind, row_id), one probe finds both, which halves
the index work of every ingested row (see plumbwatch.store.keys).
"""

from __future__ import annotations

from alembic import op

revision = "0005"
down_revision = "0002"
branch_labels = None
depends_on = None

_TABLES = ("row_keys", "row_keys_recent")
_OLD = ("model_id", "kind", "id_hash", "row_id")
_NEW = ("model_id", "id_hash", "kind", "row_id")


def _rekey(table: str, columns: tuple[str, ...]) -> None:
    if op.get_bind().dialect.name == "sqlite":
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


def upgrade() -> None:
    for table in _TABLES:
        _rekey(table, _NEW)


def downgrade() -> None:
    for table in _TABLES:
        _rekey(table, _OLD)
