"""Replays the courier's history into a running plumbwatch, then keeps a live trickle.

Replay, for each simulated day in order: the day's predictions (backdated to
their dispatch times), the outcomes that became known that day (deliveries,
and damage claims), then one evaluation of each model ``as_of`` the end of that
day. The evaluations therefore run forward in time, each applying only the
rows of one more day, and the history the pages show is the one a server
running all quarter would have recorded.

Only the last ``notify_days`` simulated days are evaluated with
``notify: true``: those are the days a real on-call rota would have seen, and
the storm's evidence crosses inside them (the rows of about day 61, matured
around day 68 of 90, see ``scenario``); the quiet weeks before are a backfill
that must not page.
An alert stays raised until its condition clears, so the storm pages once per
slice, not once per day.

``late-delivery`` is evaluated for every simulated day; ``damage-claim``, whose
outcomes take a month to mature, every ``claim_every_days`` (7) and on the last
day: a daily point adds a thirtieth of its matured data, and skipping them
keeps the replay within about a minute and a half on a 2-core machine (each
evaluation of a model costs the server a fixed amount per slice and window).

Live: every ``tick`` seconds, the parcels dispatched since the last tick and the
outcomes that became known meanwhile are sent; every ``evaluate_every`` seconds
each model is evaluated as of now (the demo server runs with its own schedule
off, so that it never evaluates as of now in the middle of the replay).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from demo_feed.scenario import (
    CLAIM_MODEL,
    DAY_S,
    LATE_MODEL,
    Day,
    Scenario,
    claim_declaration,
    late_declaration,
)
from plumbwatch.client import Client, RequestRejected

MODELS = (LATE_MODEL, CLAIM_MODEL)
LATE_DELAY_DAYS = 7  # deliveries come within 6.6 days of dispatch
CLAIM_DELAY_DAYS = 27  # claims within 26.6 days


def _stamp(seconds: int) -> str:
    return datetime.fromtimestamp(seconds, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass
class Progress:
    """Counts for the terminal, updated as the feed goes."""

    predictions: int = 0
    outcomes: int = 0
    evaluations: int = 0
    health: dict[str, str] = field(default_factory=dict)


class Feed:
    """Sends the scenario through a :class:`plumbwatch.client.Client` (admin token)."""

    def __init__(
        self,
        client: Client,
        scenario: Scenario,
        *,
        history_days: int,
        notify_days: int = 30,
        claim_every_days: int = 7,
        say: Callable[[str], None] = print,
        started_at: float | None = None,
    ) -> None:
        self.client = client
        self.scenario = scenario
        self.history_days = history_days
        self.notify_days = notify_days
        self.claim_every_days = claim_every_days
        self.say = say
        self.progress = Progress()
        self.started_at = time.time() if started_at is None else started_at
        self.first_drifting: dict[str, float] = {}  # model -> seconds after the server started
        self._days: dict[int, Day] = {}

    def day(self, index: int) -> Day:
        found = self._days.get(index)
        if found is None:
            found = self._days[index] = self.scenario.day(index)
            # Keep what claims can still refer to (27 days), drop older days.
            for old in [k for k in self._days if k < index - CLAIM_DELAY_DAYS - 1]:
                del self._days[old]
        return found

    def has_history(self) -> bool:
        """Whether the server already holds this demo's models (an earlier run)."""
        try:
            self.client.get_model(LATE_MODEL)
        except RequestRejected as exc:
            if exc.status == 404:
                return False
            raise
        return True

    def declare(self) -> None:
        self.client.put_model(LATE_MODEL, late_declaration())
        self.client.put_model(CLAIM_MODEL, claim_declaration())

    # -- sending one stretch of time -------------------------------------------

    def send_span(self, start: int, end: int) -> None:
        """Send what happened in ``[start, end)`` (epoch seconds): parcels dispatched,
        deliveries and claims that became known."""
        first = max(0, (start - self.scenario.start) // DAY_S)
        last = (end - 1 - self.scenario.start) // DAY_S
        late_p: list[dict[str, Any]] = []
        claim_p: list[dict[str, Any]] = []
        for index in range(first, last + 1):
            d = self.day(index)
            mask = (d.dispatched >= start) & (d.dispatched < end)
            if mask.any():
                late_p += d.late_predictions(mask)
                claim_p += d.claim_predictions(mask)
        late_o: list[dict[str, Any]] = []
        claim_o: list[dict[str, Any]] = []
        for index in range(max(0, first - CLAIM_DELAY_DAYS), last + 1):
            d = self.day(index)
            if index >= first - LATE_DELAY_DAYS:
                late_o += d.late_outcomes(start, end)
            claim_o += d.claim_outcomes(start, end)
        for model, rows in ((LATE_MODEL, late_p), (CLAIM_MODEL, claim_p)):
            if rows:
                self.client.send_predictions(model, rows)
                self.progress.predictions += len(rows)
        for model, rows in ((LATE_MODEL, late_o), (CLAIM_MODEL, claim_o)):
            if rows:
                self.client.send_outcomes(model, rows)
                self.progress.outcomes += len(rows)

    def evaluate_one(self, model: str, as_of: int | None, *, notify: bool) -> dict[str, Any]:
        return self.client.evaluate(
            model, as_of=None if as_of is None else _stamp(as_of), notify=notify
        )

    def evaluate(
        self, as_of: int | None, *, notify: bool, models: tuple[str, ...] = MODELS
    ) -> dict[str, str]:
        for model in models:
            self._note(model, self.evaluate_one(model, as_of, notify=notify))
        return dict(self.progress.health)

    def _note(self, model: str, record: dict[str, Any]) -> None:
        self.progress.evaluations += 1
        drifting = sorted(
            {
                s["slice"]
                for w in record.get("windows", [])
                for s in w.get("slices", [])
                if s.get("health") == "drifting"
            }
        )
        health = str(record["health"])
        self.progress.health[model] = f"{health} ({', '.join(drifting)})" if drifting else health
        if drifting and model not in self.first_drifting:
            self.first_drifting[model] = time.time() - self.started_at
            self.say(
                f"{model}: {', '.join(drifting)} drifting as of {record.get('as_of')}, "
                f"{self.first_drifting[model]:.0f} s after the server started"
            )

    # -- replay and live ---------------------------------------------------------

    def replay(self, now: int) -> float:
        """Replay every day of the history up to ``now``; returns the seconds it took."""
        began = time.monotonic()
        today = (now - self.scenario.start) // DAY_S
        for index in range(0, today + 1):
            start = self.scenario.day_start(index)
            end = min(start + DAY_S, now)
            if end <= start:
                break
            self.send_span(start, end)
            claims = index % self.claim_every_days == 0 or index == today
            models = MODELS if claims else (LATE_MODEL,)
            health = self.evaluate(end, notify=index >= today - self.notify_days, models=models)
            if index % 10 == 0 or index == today:
                self.say(
                    f"replay day {index:>2}/{today} ({_stamp(start)[:10]}): "
                    f"{self.progress.predictions:,} predictions, "
                    f"{self.progress.outcomes:,} outcomes sent; "
                    + "; ".join(f"{m}: {h}" for m, h in health.items())
                )
        return time.monotonic() - began

    def live(
        self,
        since: int,
        stop: threading.Event,
        *,
        tick: float = 15.0,
        evaluate_every: float = 60.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        """Send what happens from ``since`` on, in real time, until ``stop`` is set."""
        sent_until = since
        next_evaluation = time.monotonic()
        while not stop.is_set():
            now = int(clock())
            if now > sent_until:
                before = (self.progress.predictions, self.progress.outcomes)
                self.send_span(sent_until, now)
                sent_until = now
                new = (
                    self.progress.predictions - before[0],
                    self.progress.outcomes - before[1],
                )
            else:
                new = (0, 0)
            if time.monotonic() >= next_evaluation:
                health = self.evaluate(None, notify=True)
                next_evaluation = time.monotonic() + evaluate_every
                self.say(
                    f"live {_stamp(now)}: +{new[0]} predictions, +{new[1]} outcomes; "
                    + "; ".join(f"{m}: {h}" for m, h in health.items())
                )
            stop.wait(tick)
