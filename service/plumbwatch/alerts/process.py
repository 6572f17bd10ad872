"""Alerts for one evaluation record: the ``after_record`` hook of an evaluation run.

It runs inside the run's write transaction (see ``plumbwatch.evaluate.run``):

1. every rule of the model judges every slice of the record (pure, ``rules.judge``);
2. each slice where a calibration rule's condition holds gets health ``drifting``
   (elsewhere a ``drifting`` set by an earlier layer becomes ``watch``), and the
   model's health is recomputed as its worst slice's;
3. the lifecycle steps each (rule, slice) and records every transition as an event
   tied to this evaluation; with ``notify`` each event is queued for its sinks
   (``notify: false``, for backfills, records the lifecycle and sends nothing);
4. ``record["alerts"]`` lists the open alerts and those this run cleared, and
   ``record["deliveries"]`` the model's pending and failed deliveries.

An evaluation as of an instant at or before another evaluation of the model (a
replay into the past, or a repeat) marks health but never moves the lifecycle.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

import sqlalchemy as sa

from plumbwatch.alerts import lifecycle
from plumbwatch.alerts.events import record_event
from plumbwatch.alerts.rules import Defaults, Freshness, Rule, Verdict, judge, model_rules
from plumbwatch.alerts.sinks import Routing
from plumbwatch.alerts.status import brief
from plumbwatch.evaluate.metrics import worst
from plumbwatch.store import alerts as store_alerts
from plumbwatch.store import deliveries as store_deliveries
from plumbwatch.store.alerts import Alert, TrackRow
from plumbwatch.store.models import MonitoredModel
from plumbwatch.timefmt import parse_duration, parse_instant, to_micros


@dataclass(frozen=True)
class Context:
    """What the hook needs from the settings, built once at start."""

    defaults: Defaults
    routing: Routing
    link_base: str  # e.g. http://127.0.0.1:8000

    def link(self, model: str) -> str:
        return f"{self.link_base}/models/{quote(model, safe='')}"


def _us(text: str) -> int:
    return to_micros(parse_instant(text))


def freshness_facts(
    conn: sa.Connection, model: MonitoredModel, rule: Rule, *, as_of_us: int
) -> Freshness:
    if rule.condition == "no_predictions":
        last = store_alerts.last_prediction_us(conn, model_id=model.id, as_of_us=as_of_us)
        return Freshness(as_of_us=as_of_us, last_prediction_us=last)
    after_us = int(parse_duration(rule.after or "P1D").total_seconds() * 1_000_000)
    horizon_us = model.declaration.label_horizon_seconds * 1_000_000
    # Rows that matured in (as_of - after, as_of]: predicted in (.. - horizon, .. - horizon].
    start, end = as_of_us - after_us - horizon_us, as_of_us - horizon_us
    matured, labelled = store_alerts.matured_and_labelled(
        conn,
        model_id=model.id,
        predicted_from_us=start + 1,
        predicted_to_us=end + 1,
        as_of_us=as_of_us,
    )
    return Freshness(
        as_of_us=as_of_us,
        matured_from_us=start + horizon_us,
        matured_to_us=end + horizon_us,
        matured_rows=matured,
        labelled_rows=labelled,
    )


def verdicts_for(
    conn: sa.Connection, model: MonitoredModel, record: dict[str, Any], ctx: Context
) -> tuple[list[Rule], dict[str, dict[str, Verdict]]]:
    rules = model_rules(model.declaration, ctx.defaults)
    as_of_us = _us(record["as_of"])
    verdicts: dict[str, dict[str, Verdict]] = {}
    for rule in rules:
        facts = None if rule.calibration else freshness_facts(conn, model, rule, as_of_us=as_of_us)
        found = judge(rule, record, defaults=ctx.defaults, freshness=facts)
        verdicts[rule.name] = {v.slice: v for v in found}
    return rules, verdicts


def mark_health(
    record: dict[str, Any], rules: list[Rule], verdicts: dict[str, dict[str, Verdict]]
) -> None:
    """``drifting`` where a calibration rule's condition holds; the model's worst slice."""
    holding = {
        entry
        for rule in rules
        if rule.calibration
        for v in verdicts[rule.name].values()
        if v.holds
        for entry in v.entries
    }
    states = []
    for w in record.get("windows", []):
        for e in w.get("slices", []):
            if (w["window"], e["slice"], e.get("version")) in holding:
                e["health"] = "drifting"
            elif e.get("health") == "drifting":
                e["health"] = "watch"
            states.append(e["health"])
    record["health"] = worst(states)


def process_record(
    conn: sa.Connection,
    model: MonitoredModel,
    evaluation_id: int,
    record: dict[str, Any],
    notify: bool,
    *,
    ctx: Context,
) -> None:
    """Judge, mark health, step the lifecycle and queue notifications (see module doc)."""
    now_us, as_of_us = _us(record["evaluated_at"]), _us(record["as_of"])
    rules, verdicts = verdicts_for(conn, model, record, ctx)
    mark_health(record, rules, verdicts)
    touched: dict[int, Alert] = {}
    if not store_alerts.later_evaluation_exists(
        conn, model_id=model.id, as_of_us=as_of_us, evaluation_id=evaluation_id
    ):
        evaluation = {"id": evaluation_id, "as_of": record["as_of"]}
        touched = _step_all(
            conn,
            model,
            rules,
            verdicts,
            ctx=ctx,
            evaluation=evaluation,
            notify=notify,
            now_us=now_us,
            as_of_us=as_of_us,
        )
    current = store_alerts.open_alerts(conn, model_id=model.id)
    shown = {a.id: a for a in current.values()} | touched
    record["alerts"] = [brief(shown[i]) for i in sorted(shown)]
    record["deliveries"] = store_deliveries.model_summary(conn, model_id=model.id)


def _step_all(
    conn: sa.Connection,
    model: MonitoredModel,
    rules: list[Rule],
    verdicts: dict[str, dict[str, Verdict]],
    *,
    ctx: Context,
    evaluation: dict[str, Any],
    notify: bool,
    now_us: int,
    as_of_us: int,
) -> dict[int, Alert]:
    open_ = store_alerts.open_alerts(conn, model_id=model.id, for_update=True)
    tracks = store_alerts.load_tracks(conn, model_id=model.id)
    kept: dict[tuple[str, str], TrackRow] = {}
    touched: dict[int, Alert] = {}
    for rule in rules:
        seen = verdicts[rule.name]
        names = set(seen) | {s for r, s in tracks if r == rule.name}
        names |= {s for r, s in open_ if r == rule.name}
        for name in sorted(names):
            verdict = seen.get(name)
            alert = open_.get((rule.name, name))
            before = tracks.get((rule.name, name))
            track, change = lifecycle.step(
                lifecycle.Track(before.hold, before.calm, before.holding)
                if before
                else lifecycle.Track(),
                verdict.holds if verdict else False,
                lifecycle.Open(alert.state, alert.shelved_until_us) if alert else None,
                raise_after=rule.raise_after,
                clear_after=rule.clear_after,
                now_us=now_us,
            )
            if change is not None:
                alert = _apply(
                    conn,
                    model,
                    rule,
                    name,
                    alert,
                    change,
                    verdict,
                    ctx=ctx,
                    evaluation=evaluation,
                    notify=notify,
                    now_us=now_us,
                )
                touched[alert.id] = alert
            elif alert is not None and verdict is not None:
                store_alerts.update_values(
                    conn, alert_id=alert.id, version=verdict.version, values=verdict.values
                )
            if (alert is not None and alert.is_open) or not track.idle:
                kept[(rule.name, name)] = TrackRow(
                    track.hold, track.calm, track.holding, evaluation["id"]
                )
    declared = {r.name for r in rules}
    for (rule_name, _), alert in open_.items():
        if rule_name not in declared:  # the rule was removed: its alerts clear
            cleared = store_alerts.set_state(conn, alert=alert, state="cleared", now_us=now_us)
            record_event(
                conn,
                alert=cleared,
                kind="cleared",
                from_state=alert.state,
                at_us=now_us,
                send=notify,
                evaluation=evaluation,
                rule={"name": rule_name, "removed": True},
            )
            touched[alert.id] = cleared
    store_alerts.replace_tracks(conn, model_id=model.id, tracks=kept, as_of_us=as_of_us)
    return touched


def _apply(
    conn: sa.Connection,
    model: MonitoredModel,
    rule: Rule,
    slice_name: str,
    alert: Alert | None,
    change: lifecycle.Change,
    verdict: Verdict | None,
    *,
    ctx: Context,
    evaluation: dict[str, Any],
    notify: bool,
    now_us: int,
) -> Alert:
    if alert is None:
        assert verdict is not None and change.kind == "raised"
        after = store_alerts.create(
            conn,
            model_id=model.id,
            rule=rule.name,
            slice_name=slice_name,
            version=verdict.version,
            window=verdict.window,
            severity=rule.severity,
            values=verdict.values,
            sinks=ctx.routing.sinks_for(rule.severity, rule.sinks),
            link=ctx.link(model.name),
            now_us=now_us,
        )
    else:
        if verdict is not None:
            store_alerts.update_values(
                conn, alert_id=alert.id, version=verdict.version, values=verdict.values
            )
        after = store_alerts.set_state(conn, alert=alert, state=change.to_state, now_us=now_us)
    record_event(
        conn,
        alert=after,
        kind=change.kind,
        from_state=alert.state if alert else None,
        at_us=now_us,
        send=notify and change.notify,
        evaluation=evaluation,
        rule=rule.as_json(),
    )
    return after


def expire_shelves(conn: sa.Connection, *, now_us: int) -> int:
    """Shelves whose time is up, outside any evaluation (the sender's loop calls this,
    so expiry happens even with the scheduler off). Each alert takes the state its
    condition had at the model's last evaluation."""
    done = 0
    for alert in store_alerts.shelves_due(conn, now_us=now_us):
        track = store_alerts.get_track(
            conn, model_id=alert.model_id, rule=alert.rule, slice_name=alert.slice
        )
        change = lifecycle.expire(holding=bool(track and track.holding))
        after = store_alerts.set_state(conn, alert=alert, state=change.to_state, now_us=now_us)
        evaluation = (
            {"id": track.evaluation_id} if track and track.evaluation_id is not None else None
        )
        record_event(
            conn,
            alert=after,
            kind=change.kind,
            from_state="shelved",
            at_us=now_us,
            send=True,
            evaluation=evaluation,
        )
        done += 1
    return done
