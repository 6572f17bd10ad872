"""Alembic environment: uses a connection handed in by plumbwatch, or the configured URL."""

from __future__ import annotations

from alembic import context

from plumbwatch.store.engine import create_engine
from plumbwatch.store.tables import metadata

config = context.config


def _run(connection) -> None:  # type: ignore[no-untyped-def]
    context.configure(
        connection=connection,
        target_metadata=metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


connection = config.attributes.get("connection")
if connection is not None:
    _run(connection)
else:
    engine = create_engine(config.get_main_option("sqlalchemy.url"))
    with engine.connect() as conn:
        _run(conn)
    engine.dispose()
