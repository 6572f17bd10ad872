"""Monitored models: declarations, stored one row per model."""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa
from pydantic import ValidationError
from sqlalchemy.engine import Engine

from plumbwatch.declarations import NAME_PATTERN, ModelDeclaration
from plumbwatch.errors import ConfigError, Conflict, NotFound, PlumbwatchError
from plumbwatch.store.engine import writing
from plumbwatch.store.tables import monitored_models as t
from plumbwatch.store.tables import outcomes, predictions


@dataclass(frozen=True)
class MonitoredModel:
    id: int
    name: str
    declaration: ModelDeclaration
    created_at_us: int
    updated_at_us: int
    archived_at_us: int | None

    @property
    def kind(self) -> str:
        return self.declaration.kind

    @property
    def classes(self) -> list[str]:
        return list(self.declaration.classes or [])

    @property
    def segment_keys(self) -> list[str]:
        return list(self.declaration.segment_keys)

    @property
    def archived(self) -> bool:
        return self.archived_at_us is not None


def _from_row(row: sa.Row[Any]) -> MonitoredModel:
    declaration = ModelDeclaration.model_validate(
        {
            "kind": row.kind,
            "classes": row.classes,
            "label_horizon": row.label_horizon,
            "missing_outcome": row.missing_outcome,
            "segment_keys": row.segment_keys,
            "crosses": row.crosses,
            "windows": row.windows,
            "baseline": row.baseline,
            "rules": row.rules,
            "description": row.description,
        }
    )
    return MonitoredModel(
        id=row.id,
        name=row.name,
        declaration=declaration,
        created_at_us=row.created_at_us,
        updated_at_us=row.updated_at_us,
        archived_at_us=row.archived_at_us,
    )


def _select() -> sa.Select[Any]:
    return sa.select(t)


def get(*, conn: sa.Connection, name: str) -> MonitoredModel | None:
    row = conn.execute(_select().where(t.c.name == name)).first()
    return _from_row(row) if row else None


def get_or_raise(
    *, conn: sa.Connection, name: str, include_archived: bool = False
) -> MonitoredModel:
    model = get(conn=conn, name=name)
    if model is None or (model.archived and not include_archived):
        state = "is archived" if model else "is not declared"
        raise NotFound(
            f"model {name!r} {state}; declare it with PUT /v1/models/{name} "
            "(admin token) or in the [models] table of the TOML config"
        )
    return model


def list_models(
    *,
    conn: sa.Connection,
    include_archived: bool = False,
    after: str | None = None,
    limit: int | None = None,
) -> list[MonitoredModel]:
    query = _select().order_by(t.c.name)
    if not include_archived:
        query = query.where(t.c.archived_at_us.is_(None))
    if after is not None:
        query = query.where(t.c.name > after)
    if limit is not None:
        query = query.limit(limit)
    return [_from_row(row) for row in conn.execute(query)]


def has_rows(*, conn: sa.Connection, model_id: int) -> bool:
    for table in (predictions, outcomes):
        found = conn.execute(
            sa.select(sa.literal(1)).where(table.c.model_id == model_id).limit(1)
        ).first()
        if found:
            return True
    return False


def upsert(
    *, conn: sa.Connection, name: str, declaration: ModelDeclaration, now_us: int
) -> tuple[MonitoredModel, bool]:
    """Create or replace a declaration (and un-archive). Returns (model, created).

    ``kind``, ``classes`` and ``label_horizon`` are fixed once rows exist: changing
    them would silently change what stored rows mean.
    """
    existing = get(conn=conn, name=name)
    values = {
        "kind": declaration.kind,
        "classes": declaration.classes,
        "label_horizon_s": declaration.label_horizon_seconds,
        "label_horizon": declaration.label_horizon,
        "missing_outcome": declaration.missing_outcome,
        "segment_keys": declaration.segment_keys,
        "crosses": declaration.crosses,
        "windows": declaration.windows,
        "baseline": declaration.baseline.model_dump() if declaration.baseline else None,
        "rules": declaration.model_dump(mode="json")["rules"],
        "description": declaration.description,
        "updated_at_us": now_us,
        "archived_at_us": None,
    }
    if existing is None:
        conn.execute(sa.insert(t).values(name=name, created_at_us=now_us, **values))
        created = get(conn=conn, name=name)
        assert created is not None
        return created, True
    old = existing.declaration
    changed = [
        field
        for field, before, after in (
            ("kind", old.kind, declaration.kind),
            ("classes", old.classes, declaration.classes),
            ("label_horizon", old.label_horizon_seconds, declaration.label_horizon_seconds),
        )
        if before != after
    ]
    if changed and has_rows(conn=conn, model_id=existing.id):
        raise Conflict(
            f"model {name!r} already has rows; {', '.join(changed)} cannot change. "
            "Declare a new model name instead."
        )
    if old == declaration and not existing.archived:
        return existing, False
    conn.execute(sa.update(t).where(t.c.id == existing.id).values(**values))
    updated = get(conn=conn, name=name)
    assert updated is not None
    return updated, False


def archive(*, conn: sa.Connection, name: str, now_us: int) -> MonitoredModel:
    model = get_or_raise(conn=conn, name=name)
    conn.execute(sa.update(t).where(t.c.id == model.id).values(archived_at_us=now_us))
    archived = get(conn=conn, name=name)
    assert archived is not None
    return archived


def apply_declarations(engine: Engine, declared: dict[str, dict[str, Any]], *, now_us: int) -> None:
    """Create or update the models declared in the TOML file (idempotent).

    Raises ConfigError naming the model and the problem; nothing is applied
    unless every declaration is valid.
    """
    parsed: dict[str, ModelDeclaration] = {}
    for name, body in declared.items():
        if not re.match(NAME_PATTERN, name):
            raise ConfigError(f"[models.{name}] in the config file: invalid model name")
        try:
            parsed[name] = ModelDeclaration.model_validate(body)
        except ValidationError as exc:
            problems = "; ".join(
                f"{'.'.join(str(p) for p in e['loc']) or 'body'}: {e['msg']}" for e in exc.errors()
            )
            raise ConfigError(f"[models.{name}] in the config file: {problems}") from None
    with writing(engine) as conn:
        for name, declaration in parsed.items():
            try:
                upsert(conn=conn, name=name, declaration=declaration, now_us=now_us)
            except PlumbwatchError as exc:
                raise ConfigError(f"[models.{name}] in the config file: {exc.message}") from None
