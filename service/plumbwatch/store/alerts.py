"""Alerts, their events and the hysteresis counters behind them.

The caller owns the transaction. Reads meant to be followed by a write take row
locks on PostgreSQL (``for_update``); on SQLite the writer's ``BEGIN IMMEDIATE``
already serialises them.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from typing import Any

import orjson
import sqlalchemy as sa

from plumbwatch.errors import NotFound
from plumbwatch.store.tables import (
    alert_events,
    alert_tracks,
    alerts,
    evaluations,
    monitored_models,
    outcomes,
    predictions,
)
from plumbwatch.timefmt import format_instant

STATES = ("active", "acknowledged", "shelved", "cleared")
OPEN_STATES = ("active", "acknowledged", "shelved")


@dataclass(frozen=True)
class Alert:
    id: int
    model_id: int
    model: str
    rule: str
    slice: str
    version: str | None
    window: str | None
    severity: str
    state: str
    raised_at_us: int
    since_us: int
    acknowledged_by: str | None
    shelved_until_us: int | None
    cleared_at_us: int | None
    values: dict[str, Any]
    sinks: list[str]
    link: str

    @property
    def is_open(self) -> bool:
        return self.state != "cleared"

    def as_dict(self) -> dict[str, Any]:
        """The alert as the API, the status JSON and notifications show it."""

        def instant(us: int | None) -> str | None:
            return format_instant(us) if us is not None else None

        return {
            "id": self.id,
            "model": self.model,
            "rule": self.rule,
            "slice": self.slice,
            "version": self.version,
            "window": self.window,
            "state": self.state,
            "severity": self.severity,
            "raised_at": format_instant(self.raised_at_us),
            "since": format_instant(self.since_us),
            "acknowledged_by": self.acknowledged_by,
            "shelved_until": instant(self.shelved_until_us),
            "cleared_at": instant(self.cleared_at_us),
            "values": self.values,
            "link": self.link,
        }


@dataclass(frozen=True)
class TrackRow:
    hold: int
    calm: int
    holding: bool
    evaluation_id: int | None


def open_key(model_id: int, rule: str, slice_name: str) -> str:
    return f"{model_id}/{rule}/{slice_name}"


def new_event_id() -> str:
    """A stable, unique id for one event: receivers deduplicate on it (webhook-id)."""
    return f"evt_{uuid.uuid4().hex}"


def _select() -> sa.Select[Any]:
    return sa.select(alerts, monitored_models.c.name.label("model_name")).join(
        monitored_models, alerts.c.model_id == monitored_models.c.id
    )


def _from_row(row: sa.Row[Any]) -> Alert:
    return Alert(
        id=row.id,
        model_id=row.model_id,
        model=row.model_name,
        rule=row.rule,
        slice=row.slice,
        version=row.version,
        window=row.window_name,
        severity=row.severity,
        state=row.state,
        raised_at_us=row.raised_at_us,
        since_us=row.since_us,
        acknowledged_by=row.acknowledged_by,
        shelved_until_us=row.shelved_until_us,
        cleared_at_us=row.cleared_at_us,
        values=orjson.loads(row.detail),
        sinks=list(row.sinks or []),
        link=row.link,
    )


def get(conn: sa.Connection, *, alert_id: int, for_update: bool = False) -> Alert | None:
    query = _select().where(alerts.c.id == alert_id)
    if for_update:
        query = query.with_for_update(of=alerts)
    row = conn.execute(query).first()
    return _from_row(row) if row else None


def get_or_raise(conn: sa.Connection, *, alert_id: int, for_update: bool = False) -> Alert:
    found = get(conn, alert_id=alert_id, for_update=for_update)
    if found is None:
        raise NotFound(f"alert {alert_id} does not exist; GET /v1/alerts lists them")
    return found


def open_alerts(
    conn: sa.Connection, *, model_id: int, for_update: bool = False
) -> dict[tuple[str, str], Alert]:
    """The model's open alerts by (rule, slice)."""
    query = _select().where(alerts.c.model_id == model_id, alerts.c.open_key.is_not(None))
    if for_update:
        query = query.with_for_update(of=alerts)
    return {(a.rule, a.slice): a for a in map(_from_row, conn.execute(query.order_by(alerts.c.id)))}


def create(
    conn: sa.Connection,
    *,
    model_id: int,
    rule: str,
    slice_name: str,
    version: str | None,
    window: str | None,
    severity: str,
    values: dict[str, Any],
    sinks: list[str],
    link: str,
    now_us: int,
) -> Alert:
    """A new active alert; IntegrityError if one is open for (model, rule, slice)."""
    alert_id = conn.execute(
        sa.insert(alerts)
        .values(
            model_id=model_id,
            rule=rule,
            slice=slice_name,
            version=version,
            window_name=window,
            severity=severity,
            state="active",
            open_key=open_key(model_id, rule, slice_name),
            raised_at_us=now_us,
            since_us=now_us,
            detail=orjson.dumps(values).decode(),
            sinks=sinks,
            link=link,
        )
        .returning(alerts.c.id)
    ).scalar_one()
    return get_or_raise(conn, alert_id=int(alert_id))


def set_state(
    conn: sa.Connection,
    *,
    alert: Alert,
    state: str,
    now_us: int,
    acknowledged_by: str | None = None,
    shelved_until_us: int | None = None,
) -> Alert:
    """Move an alert to ``state`` (the caller checked the move is allowed)."""
    values: dict[str, Any] = {"state": state, "since_us": now_us}
    if state == "cleared":
        values.update(open_key=None, cleared_at_us=now_us, shelved_until_us=None)
    elif state == "acknowledged":
        values.update(acknowledged_by=acknowledged_by, shelved_until_us=None)
    elif state == "shelved":
        values.update(shelved_until_us=shelved_until_us, acknowledged_by=acknowledged_by)
    else:  # active again: a fresh call for attention
        values.update(acknowledged_by=None, shelved_until_us=None)
    conn.execute(sa.update(alerts).where(alerts.c.id == alert.id).values(**values))
    return get_or_raise(conn, alert_id=alert.id)


def update_values(
    conn: sa.Connection, *, alert_id: int, version: str | None, values: dict[str, Any]
) -> None:
    conn.execute(
        sa.update(alerts)
        .where(alerts.c.id == alert_id)
        .values(version=version, detail=orjson.dumps(values).decode())
    )


def add_event(
    conn: sa.Connection,
    *,
    alert_id: int,
    event_id: str,
    kind: str,
    from_state: str | None,
    to_state: str,
    evaluation_id: int | None,
    actor: str | None,
    at_us: int,
    payload: str,
) -> int:
    return int(
        conn.execute(
            sa.insert(alert_events)
            .values(
                alert_id=alert_id,
                event_id=event_id,
                kind=kind,
                from_state=from_state,
                to_state=to_state,
                evaluation_id=evaluation_id,
                actor=actor,
                at_us=at_us,
                payload=payload,
            )
            .returning(alert_events.c.id)
        ).scalar_one()
    )


def list_events(conn: sa.Connection, *, alert_id: int) -> list[dict[str, Any]]:
    rows = conn.execute(
        sa.select(alert_events)
        .where(alert_events.c.alert_id == alert_id)
        .order_by(alert_events.c.id)
    )
    return [
        {
            "event_id": r.event_id,
            "kind": r.kind,
            "from_state": r.from_state,
            "to_state": r.to_state,
            "evaluation_id": r.evaluation_id,
            "actor": r.actor,
            "at": format_instant(r.at_us),
        }
        for r in rows
    ]


def list_alerts(
    conn: sa.Connection,
    *,
    state: str | None = None,
    model_id: int | None = None,
    limit: int = 100,
    after_id: int | None = None,
) -> list[dict[str, Any]]:
    """Alerts newest first, as dicts (``Alert.as_dict``).

    ``state``: one of STATES, or ``open`` for any but cleared. ``after_id``: the last
    id of the previous page (the next page holds older alerts).
    """
    query = _select()
    if state == "open":
        query = query.where(alerts.c.state != "cleared")
    elif state is not None:
        query = query.where(alerts.c.state == state)
    if model_id is not None:
        query = query.where(alerts.c.model_id == model_id)
    if after_id is not None:
        query = query.where(alerts.c.id < after_id)
    rows = conn.execute(query.order_by(alerts.c.id.desc()).limit(limit))
    return [_from_row(r).as_dict() for r in rows]


def any_shelf_due(conn: sa.Connection, *, now_us: int) -> bool:
    found = conn.execute(
        sa.select(sa.literal(1))
        .where(alerts.c.state == "shelved", alerts.c.shelved_until_us <= now_us)
        .limit(1)
    ).first()
    return found is not None


def shelves_due(conn: sa.Connection, *, now_us: int) -> list[Alert]:
    """Shelved alerts whose time is up (locked for the update that follows)."""
    query = (
        _select()
        .where(alerts.c.state == "shelved", alerts.c.shelved_until_us <= now_us)
        .order_by(alerts.c.id)
        .with_for_update(of=alerts)
    )
    return [_from_row(r) for r in conn.execute(query)]


# -- hysteresis counters ----------------------------------------------------------------


def load_tracks(conn: sa.Connection, *, model_id: int) -> dict[tuple[str, str], TrackRow]:
    rows = conn.execute(sa.select(alert_tracks).where(alert_tracks.c.model_id == model_id))
    return {
        (r.rule, r.slice): TrackRow(r.hold, r.calm, bool(r.holding), r.evaluation_id) for r in rows
    }


def get_track(conn: sa.Connection, *, model_id: int, rule: str, slice_name: str) -> TrackRow | None:
    r = conn.execute(
        sa.select(alert_tracks).where(
            alert_tracks.c.model_id == model_id,
            alert_tracks.c.rule == rule,
            alert_tracks.c.slice == slice_name,
        )
    ).first()
    return TrackRow(r.hold, r.calm, bool(r.holding), r.evaluation_id) if r else None


def replace_tracks(
    conn: sa.Connection,
    *,
    model_id: int,
    tracks: dict[tuple[str, str], TrackRow],
    as_of_us: int,
) -> None:
    """Store the model's counters (the few that matter; idle ones are not kept)."""
    conn.execute(sa.delete(alert_tracks).where(alert_tracks.c.model_id == model_id))
    if tracks:
        conn.execute(
            sa.insert(alert_tracks),
            [
                {
                    "model_id": model_id,
                    "rule": rule,
                    "slice": name,
                    "hold": t.hold,
                    "calm": t.calm,
                    "holding": t.holding,
                    "evaluation_id": t.evaluation_id,
                    "as_of_us": as_of_us,
                }
                for (rule, name), t in tracks.items()
            ],
        )


def later_evaluation_exists(
    conn: sa.Connection, *, model_id: int, as_of_us: int, evaluation_id: int
) -> bool:
    """Whether another evaluation of the model is as of this instant or later (so this
    one is a replay into the past or a repeat, which must not move the lifecycle)."""
    found = conn.execute(
        sa.select(sa.literal(1))
        .where(
            evaluations.c.model_id == model_id,
            evaluations.c.as_of_us >= as_of_us,
            evaluations.c.id != evaluation_id,
        )
        .limit(1)
    ).first()
    return found is not None


# -- freshness facts ----------------------------------------------------------------------


def last_prediction_us(conn: sa.Connection, *, model_id: int, as_of_us: int) -> int | None:
    """The latest predicted_at at or before ``as_of_us`` (an index range scan)."""
    value = conn.execute(
        sa.select(sa.func.max(predictions.c.predicted_at_us)).where(
            predictions.c.model_id == model_id, predictions.c.predicted_at_us <= as_of_us
        )
    ).scalar_one()
    return int(value) if value is not None else None


def matured_and_labelled(
    conn: sa.Connection,
    *,
    model_id: int,
    predicted_from_us: int,
    predicted_to_us: int,
    as_of_us: int,
) -> tuple[bool, bool]:
    """For predictions made in [from, to): whether there are any, and whether any of
    them has an outcome observed by ``as_of_us``. Both stop at the first row found, so
    a labelling job that works costs one lookup."""
    in_span = sa.and_(
        predictions.c.model_id == model_id,
        predictions.c.predicted_at_us >= predicted_from_us,
        predictions.c.predicted_at_us < predicted_to_us,
    )
    matured = conn.execute(sa.select(sa.literal(1)).where(in_span).limit(1)).first() is not None
    if not matured:
        return False, False
    labelled = conn.execute(
        sa.select(sa.literal(1))
        .select_from(predictions.join(outcomes, outcomes.c.prediction_id == predictions.c.id))
        .where(in_span, outcomes.c.observed_at_us <= as_of_us)
        .limit(1)
    ).first()
    return True, labelled is not None
