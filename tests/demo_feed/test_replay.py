"""The replay drives a real server forward, one evaluation per simulated day, as of
the end of that day; what the server then reports matches the generated rows."""

from __future__ import annotations

import threading
import time
from datetime import UTC, datetime

import numpy as np
import pytest
from demo_feed.replay import Feed
from demo_feed.scenario import CLAIM_MODEL, LATE_MODEL, Scenario

from plumbwatch.client import Client
from plumbwatch.timefmt import parse_instant
from tests import live

pytestmark = pytest.mark.timeout(300)

DAYS = 10


def test_replay_evaluates_each_day_as_of_its_end(live_service: tuple[live.Server, str]) -> None:
    server, token = live_service
    now = datetime.now(UTC).replace(microsecond=0)
    scenario = Scenario.ending_today(now, history_days=DAYS, parcels_per_day=150)
    said: list[str] = []
    with Client(server.url, token) as client:
        feed = Feed(client, scenario, history_days=DAYS, notify_days=3, say=said.append)
        assert not feed.has_history()
        feed.declare()
        assert feed.has_history()  # a second run would refuse to replay over it
        feed.replay(int(now.timestamp()))
        listed = client._json("GET", f"/v1/models/{LATE_MODEL}/evaluations?limit=100")
        claims = client._json("GET", f"/v1/models/{CLAIM_MODEL}/evaluations?limit=100")
        status = client.status(LATE_MODEL)

        stop = threading.Event()

        def say_and_stop(text: str) -> None:
            said.append(text)
            stop.set()

        feed.say = say_and_stop
        feed.live(int(now.timestamp()), stop, tick=0.01, evaluate_every=0)
        after_live = client._json("GET", f"/v1/models/{LATE_MODEL}/evaluations?limit=100")

    def as_of(records: list[dict[str, str]]) -> list[int]:
        return [int(parse_instant(r["as_of"]).timestamp()) for r in records]

    # late-delivery: one per simulated day, in order, the last one as of now;
    # damage-claim: every seventh day and the last.
    last = int(now.timestamp())
    assert as_of(listed["evaluations"]) == [scenario.day_start(i + 1) for i in range(DAYS)] + [last]
    assert as_of(claims["evaluations"]) == [scenario.day_start(1), scenario.day_start(8), last]
    assert len(after_live["evaluations"]) == DAYS + 2  # and the live feed's first run
    assert said[0].startswith("replay day  0/10") and said[-1].startswith("live ")

    # The newest 7-day window counts exactly the generated parcels of its cohort days.
    window = next(w for w in status["windows"] if w["window"] == "P7D")
    start = int(parse_instant(window["start"]).timestamp())
    end = int(parse_instant(window["end"]).timestamp())
    late, n = 0, 0
    for d in scenario.days(0, DAYS):
        keep = (d.dispatched >= start) & (d.dispatched < end)
        n += int(keep.sum())
        late += int(d.late[keep].sum())
    overall = next(s for s in window["slices"] if s["slice"] == "overall")
    assert n > 0 and overall["metrics"]["n"] == n
    assert overall["metrics"]["observed_rate"] == pytest.approx(late / n)
    assert np.isfinite(overall["metrics"]["log_loss"])
    assert time.time() - now.timestamp() < 300
