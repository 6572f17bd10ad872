"""Alert quality by simulation with fixed seeds, through the real evaluation path (as_of
replay, ``notify`` true) with the default rules; every alert is delivered to a real
webhook receiver on 127.0.0.1, so the test sees what on-call would see.

- A calibrated stream of 40 slices over 365 daily evaluations (200 matured rows per
  slice per day) raises no alert at the declared alpha in at least (1 - alpha) of the
  seeds. With fewer than 1/alpha seeds that means: in none of them.
- A stream in which one slice's odds rise 1.5x from day 100 raises an alert for that
  slice (the delay in days is reported) and for no other leaf slice (the overall slice
  may alert too).

That full scale (a year of 40 zones per seed, several minutes of CPU each) runs with
``PLUMBWATCH_QUALITY_FULL=1``; ``PLUMBWATCH_QUALITY_SEEDS`` sets how many calibrated
seeds it runs (default 3). ``make test`` runs the same path and assertions at a
reduced scale: 10 zones, 200 rows per zone per day, 120 daily evaluations, two
calibrated seeds, and the drift from day 30.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson
import pytest
from standardwebhooks.webhooks import Webhook

from plumbwatch.config import Settings
from plumbwatch.jobs.alerting import Alerting
from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import upgrade
from tests import simulation
from tests.alerts.flow import new_secret
from tests.alerts.receiver import Receiver, receiving

pytestmark = [pytest.mark.slow, pytest.mark.timeout(7200)]

ALPHA = 0.01
FULL = os.environ.get("PLUMBWATCH_QUALITY_FULL") == "1"
# The scale on demand; a reduced one (same path, same assertions) in make test.
SCALE: dict[str, int] = {} if FULL else {"n_slices": 10, "days": 120}
SEEDS = int(os.environ.get("PLUMBWATCH_QUALITY_SEEDS", "3")) if FULL else 2
DRIFT_SLICE = "zone:z07"
DRIFT_DAY = 100 if FULL else 30


@dataclass
class Outcome:
    """What on-call received during one simulated year."""

    seed: int
    as_of: list[str] = field(default_factory=list)  # one per evaluation, in order
    raised: list[dict[str, Any]] = field(default_factory=list)  # alert.raised bodies

    def day_of(self, as_of: str) -> int:
        return self.as_of.index(as_of)


def _run(tmp: Path, scenario: Any, rx: Receiver) -> Outcome:
    secret = new_secret()
    engine = create_engine(f"sqlite:///{tmp / f'seed-{scenario.seed}.db'}")
    upgrade(engine)
    settings = Settings(
        database_url=str(engine.url),
        evidence_alpha=ALPHA,
        webhook_url=rx.url,
        webhook_secret=secret,
        delivery_retry_initial="PT0.1S",
    )
    alerting = Alerting(engine, settings, holder=f"quality-{scenario.seed}", clock_us=lambda: 0)
    outcome = Outcome(scenario.seed)
    seen = len(rx.requests)

    def on_record(*args: Any) -> None:
        record = next(a for a in args if isinstance(a, dict))
        outcome.as_of.append(record["as_of"])
        alerting.sender.run_until_idle()  # deliver now, as the server's sender would

    try:
        simulation.run_scenario(
            engine,
            scenario,
            settings={"evidence_alpha": ALPHA},
            after_record=alerting.after_record,
            on_record=on_record,
        )
        alerting.sender.run_until_idle()
    finally:
        engine.dispose()
    for request in rx.requests[seen:]:
        if request.status != 200:
            continue
        payload = Webhook(secret).verify(request.body, request.headers)
        if payload["type"] == "alert.raised":
            outcome.raised.append(payload["data"])
    return outcome


@pytest.fixture(scope="module")
def receiver() -> Iterator[Receiver]:
    with receiving() as rx:
        yield rx


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory: pytest.TempPathFactory, receiver: Receiver) -> list[Outcome]:
    tmp = tmp_path_factory.mktemp("calibrated")
    return [_run(tmp, simulation.Scenario(seed=seed, **SCALE), receiver) for seed in range(SEEDS)]


@pytest.fixture(scope="module")
def drifting(tmp_path_factory: pytest.TempPathFactory, receiver: Receiver) -> Outcome:
    tmp = tmp_path_factory.mktemp("drifting")
    scenario = simulation.Scenario(
        seed=1_000, drift_slice=DRIFT_SLICE, drift_from_day=DRIFT_DAY, odds=1.5, **SCALE
    )
    return _run(tmp, scenario, receiver)


def test_calibrated_streams_raise_no_false_alert(calibrated: list[Outcome]) -> None:
    # A calibration alert on a calibrated stream is a false alert. Freshness alerts
    # (the stream stopping) would be true ones; they are reported, and counted apart.
    def false(o: Outcome) -> list[dict[str, Any]]:
        return [a for a in o.raised if a["rule"] == "calibration"]

    with_false = [o for o in calibrated if false(o)]
    report = {
        "alpha": ALPHA,
        "seeds": len(calibrated),
        "seeds_with_a_false_alert": len(with_false),
        "alerts": [(o.seed, a["rule"], a["slice"]) for o in calibrated for a in o.raised],
    }
    print("calibrated:", orjson.dumps(report).decode())
    days = simulation.Scenario(seed=0, **SCALE).days
    assert all(len(o.as_of) == days for o in calibrated)
    # At least (1 - alpha) of the seeds without any alert.
    assert len(with_false) <= math.floor(ALPHA * len(calibrated)), report


def test_a_drifting_slice_alerts_and_no_other_leaf_does(drifting: Outcome) -> None:
    leaves = {a["slice"] for a in drifting.raised if a["slice"] != "overall"}
    ours = [a for a in drifting.raised if a["slice"] == DRIFT_SLICE]
    report: dict[str, Any] = {"raised": sorted((a["rule"], a["slice"]) for a in drifting.raised)}
    if ours:
        day = drifting.day_of(ours[0]["evaluation"]["as_of"])
        report["delay_days"] = day - DRIFT_DAY
        assert day >= DRIFT_DAY, report  # nothing before the change
    print("drifting:", orjson.dumps(report).decode())
    assert ours, report
    assert leaves == {DRIFT_SLICE}, report
