"""Schema migrations through Alembic, driven from code (``plumbwatch migrate``)."""

from __future__ import annotations

import os
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy.engine import Engine

from plumbwatch.errors import SchemaBehindError


def migrations_dir() -> Path:
    override = os.environ.get("PLUMBWATCH_MIGRATIONS_DIR")
    if override:
        return Path(override)
    # service/plumbwatch/store/migrate.py -> repository root / migrations
    return Path(__file__).resolve().parents[3] / "migrations"


def alembic_config(engine: Engine) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    url = engine.url.render_as_string(hide_password=False)
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))  # configparser escaping
    return cfg


def upgrade(engine: Engine, revision: str = "head") -> None:
    cfg = alembic_config(engine)
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)


def head_revision(engine: Engine) -> str | None:
    return ScriptDirectory.from_config(alembic_config(engine)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def require_current(engine: Engine) -> None:
    """Raise SchemaBehindError, naming the command that fixes it, unless the schema is at head."""
    current, head = current_revision(engine), head_revision(engine)
    if current != head:
        where = current or "empty"
        raise SchemaBehindError(
            f"database schema is at revision {where}, the code needs {head}: "
            "run `plumbwatch migrate` first"
        )
