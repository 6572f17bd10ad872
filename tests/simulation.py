"""A reusable simulation of one monitored model, day by day, through the real evaluation path.

A calibrated binary model ``sim`` scores ``rows_per_slice_day`` parcels a day in each of
``n_slices`` zones (segment key ``zone``, values ``z00``, ``z01``, ...), with
probabilities drawn from Beta(2, 5) and outcomes drawn from them (so every slice is
calibrated), except that from ``drift_from_day`` on the true odds of ``drift_slice``
are multiplied by ``odds``. Outcomes are observed within the label horizon: uniformly
over it, or with ``positives_first`` positives within half a day and negatives in the
last two hours before the horizon (the label-delay trap of METHODS.md section 13).

Each simulated day, the day's predictions and the outcomes observed that day are
written through the store's ingest functions (``write_predictions``,
``write_outcomes``: the rows and keys the API would store, without HTTP), then the
model is evaluated through ``evaluate_model`` with ``as_of`` the end of the day, as a
live deployment evaluating at midnight would. Only the window ``P7D`` is declared.

Everything is drawn from ``numpy.random.default_rng([seed, day])``: a scenario is
reproducible day by day. Records are returned whole; at the full scale (40 slices x
365 days) a record is about 100 kB, so callers that keep many scenarios should reduce
them in ``on_record`` instead.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import logsumexp
from sqlalchemy.engine import Engine

from plumbwatch.config import Settings
from plumbwatch.declarations import ModelDeclaration
from plumbwatch.evaluate.run import AfterRecord, Options, evaluate_model
from plumbwatch.stats.evidence import MixtureEvidence, binary_log_lr
from plumbwatch.store import models as store_models
from plumbwatch.store.engine import BEGIN_OPTION
from plumbwatch.store.ingest import write_outcomes, write_predictions
from plumbwatch.timefmt import parse_instant, to_micros
from plumbwatch.validation import OutcomeRow, PredictionRow

MODEL = "sim"
T0_US = to_micros(parse_instant("2027-01-04T00:00:00Z"))
DAY_US = 86_400 * 1_000_000
HOUR_US = 3_600 * 1_000_000


@dataclass(frozen=True)
class Scenario:
    seed: int
    n_slices: int = 40  # values z00..z39 of one segment key "zone"
    rows_per_slice_day: int = 200
    days: int = 365
    drift_slice: str | None = None  # e.g. "zone:z07"; its odds multiply from drift_from_day
    drift_from_day: int = 100
    odds: float = 1.5
    positives_first: bool = False  # positives labelled soon, negatives near the horizon
    horizon_days: int = 3


def zone(i: int) -> str:
    return f"z{i:02d}"


@dataclass(frozen=True)
class Day:
    """One simulated day's rows, in prediction-time order."""

    zone: np.ndarray  # index of the zone
    p: np.ndarray
    y: np.ndarray
    predicted_at_us: np.ndarray
    observed_at_us: np.ndarray


def day_rows(s: Scenario, day: int) -> Day:
    """The rows of ``day`` (the same arrays whoever asks: seeded by ``[seed, day]``)."""
    rng = np.random.default_rng([s.seed, day])
    per = s.rows_per_slice_day
    n = s.n_slices * per
    zones = rng.permutation(np.repeat(np.arange(s.n_slices), per))
    p = rng.beta(2.0, 5.0, n)
    odds = np.ones(n)
    if s.drift_slice is not None and day >= s.drift_from_day:
        odds[np.array([f"zone:{zone(int(z))}" == s.drift_slice for z in zones])] = s.odds
    q = odds * p / (1.0 - p + odds * p)
    y = (rng.random(n) < q).astype(np.int64)
    at = T0_US + day * DAY_US + np.sort(rng.integers(0, DAY_US, n))
    horizon = s.horizon_days * DAY_US
    if s.positives_first:
        delay = np.where(
            y == 1,
            rng.integers(HOUR_US, 12 * HOUR_US, n),
            horizon - rng.integers(0, 2 * HOUR_US, n),
        )
    else:
        delay = rng.integers(HOUR_US, horizon + 1, n)
    return Day(zones, p, y, at, at + delay)


def _ingest_rows(s: Scenario, day: int) -> tuple[list[PredictionRow], list[tuple[int, str, int]]]:
    """The day's predictions, and their outcomes as (observed_at, id, outcome)."""
    d = day_rows(s, day)
    segments = [f'{{"zone":"{zone(i)}"}}' for i in range(s.n_slices)]
    preds = [
        PredictionRow(i, f"d{day}-{i}", int(at), float(p), None, "v1", segments[z])
        for i, (at, p, z) in enumerate(zip(d.predicted_at_us, d.p, d.zone, strict=True))
    ]
    outs = [
        (int(o), f"d{day}-{i}", int(y))
        for i, (o, y) in enumerate(zip(d.observed_at_us, d.y, strict=True))
    ]
    return preds, outs


def declare(engine: Engine, scenario: Scenario) -> store_models.MonitoredModel:
    decl = ModelDeclaration.model_validate(
        {
            "kind": "binary",
            "label_horizon": f"P{scenario.horizon_days}D",
            "segment_keys": ["zone"],
            "windows": ["P7D"],
            "description": "simulated parcels",
        }
    )
    with engine.begin() as conn:
        model, _ = store_models.upsert(conn=conn, name=MODEL, declaration=decl, now_us=T0_US)
    return model


def run_scenario(
    engine: Engine,
    scenario: Scenario,
    *,
    settings: dict[str, Any] | None = None,
    after_record: AfterRecord | None = None,
    on_record: Callable[[int, dict[str, Any]], None] | None = None,
) -> list[dict[str, Any]]:
    """Declare the model "sim", feed each simulated day through the store's ingest path,
    evaluate once per simulated day through evaluate_model with as_of (passing
    after_record), call on_record(day, record) if given; return the records.

    ``settings`` are plumbwatch settings (e.g. ``{"evidence_alpha": 0.05}``) turned into
    the evaluation options as the server does."""
    model = declare(engine, scenario)
    config = Settings(database_url=str(engine.url), **(settings or {}))
    options = Options.from_settings(config)
    pending: dict[int, list[OutcomeRow]] = defaultdict(list)  # observed day -> outcomes
    records = []
    for day in range(scenario.days):
        preds, outs = _ingest_rows(scenario, day)
        for observed, cid, y in outs:
            pending[(observed - T0_US) // DAY_US].append(OutcomeRow(0, cid, y, observed))
        as_of = T0_US + (day + 1) * DAY_US
        write = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
        with write, write.begin():
            write_predictions(write, model_id=model.id, rows=preds, now_us=as_of)
            write_outcomes(
                write, model_id=model.id, rows=pending.pop(day, []), now_us=as_of, correction=False
            )
        record = evaluate_model(
            engine,
            model,
            as_of_us=as_of,
            now_us=as_of,
            options=options,
            after_record=after_record,
        )
        if on_record is not None:
            on_record(day, record)
        records.append(record)
    return records


def reference_log_evidence(
    s: Scenario, *, grace_days: int = 1, arrival_order: bool = False
) -> np.ndarray:
    """The mixture e-process of METHODS.md section 7.2 computed directly, without the service.

    Returns ``log E`` at the end of each daily run, shape ``(days, 1 + n_slices)``:
    column 0 is ``overall``, column ``1 + i`` is zone ``i``. Rows are fed at the first
    run whose as_of is at least ``predicted_at + horizon + grace`` (maturity order, as the
    service does) or, with ``arrival_order``, at the first run after their outcome was
    observed (the invalid order of METHODS.md section 7.5, for contrast).
    """
    template = MixtureEvidence.start()
    a, b, lw = template.params[:, 0], template.params[:, 1], template.log_weights
    n_s, j = s.n_slices, a.size
    cum = np.zeros((n_s, j))
    later: dict[int, np.ndarray] = defaultdict(lambda: np.zeros((n_s, j)))
    out = np.empty((s.days, 1 + n_s))
    lag = s.horizon_days + grace_days
    for day in range(s.days):
        d = day_rows(s, day)
        lr = binary_log_lr(d.y, d.p, a, b)
        if arrival_order:
            run = (d.observed_at_us - T0_US - 1) // DAY_US
        else:
            run = -(-(d.predicted_at_us - T0_US) // DAY_US) + lag - 1
        for r in np.unique(run):
            chosen = run == r
            np.add.at(later[int(r)], d.zone[chosen], lr[chosen])
        cum += later.pop(day, 0.0)
        out[day, 1:] = logsumexp(lw[None, :] + cum, axis=1)
        out[day, 0] = logsumexp(lw + cum.sum(axis=0))
    return out


def false_alarm(log_e: np.ndarray, *, alpha: float, until: int | None = None) -> bool:
    """Whether any slice's run-end log E reached ``ln(K / alpha)`` (K slices) by run ``until``."""
    k = log_e.shape[1]
    return bool((log_e[:until] >= np.log(k / alpha)).any())


__all__ = [
    "DAY_US",
    "MODEL",
    "T0_US",
    "Day",
    "Scenario",
    "day_rows",
    "false_alarm",
    "reference_log_evidence",
    "run_scenario",
    "zone",
]
