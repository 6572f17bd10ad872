"""The alert lifecycle as pure functions: (previous state, verdict, time) -> change.

States (ISA-18.2's words, DESIGN.md "Names"): ``active`` -> ``acknowledged`` ->
``cleared``, and ``shelved`` until a time. One alert per (model, rule, slice) is
open at a time; a new one is raised only after the previous one cleared.

Hysteresis: a rule raises after ``raise_after`` consecutive evaluations in which
its condition held, and an open alert clears after ``clear_after`` consecutive
evaluations in which it did not. A shelved alert stays quiet until its time is
up; then it takes the state its condition has (``active`` again if it still
holds, else ``cleared``). An alert that clears while on the shelf clears quietly.
"""

from __future__ import annotations

from dataclasses import dataclass

from plumbwatch.errors import Conflict, Detail, InvalidInput


@dataclass(frozen=True)
class Track:
    """Consecutive evaluations in which a rule's condition held (hold) or not (calm)."""

    hold: int = 0
    calm: int = 0
    holding: bool = False

    def after(self, holds: bool) -> Track:
        if holds:
            return Track(hold=self.hold + 1, calm=0, holding=True)
        return Track(hold=0, calm=self.calm + 1, holding=False)

    @property
    def idle(self) -> bool:
        return self.hold == 0


@dataclass(frozen=True)
class Open:
    """What the lifecycle needs to know of an open alert."""

    state: str  # active | acknowledged | shelved
    shelved_until_us: int | None = None


@dataclass(frozen=True)
class Change:
    kind: str  # raised | cleared | reactivated | acknowledged | shelved
    to_state: str
    notify: bool = True  # False: it happened on the shelf, on-call is not told


RAISED = Change("raised", "active")
CLEARED = Change("cleared", "cleared")
CLEARED_ON_SHELF = Change("cleared", "cleared", notify=False)
REACTIVATED = Change("reactivated", "active")


def step(
    track: Track,
    holds: bool,
    alert: Open | None,
    *,
    raise_after: int,
    clear_after: int,
    now_us: int,
) -> tuple[Track, Change | None]:
    """One evaluation's verdict applied to a (model, rule, slice)."""
    track = track.after(holds)
    if alert is None:
        if holds and track.hold >= raise_after:
            return track, RAISED
        return track, None
    if alert.state == "shelved" and _expired(alert, now_us):
        return track, expire(holding=holds)
    if track.calm >= clear_after:
        return track, CLEARED_ON_SHELF if alert.state == "shelved" else CLEARED
    return track, None


def _expired(alert: Open, now_us: int) -> bool:
    return alert.shelved_until_us is not None and alert.shelved_until_us <= now_us


def expire(*, holding: bool) -> Change:
    """A shelf whose time is up: the alert takes the state its condition has."""
    return REACTIVATED if holding else CLEARED


def shelf_due(alert: Open, now_us: int) -> bool:
    return alert.state == "shelved" and _expired(alert, now_us)


def acknowledge(alert_id: int, state: str) -> Change | None:
    """A person acknowledges: None when it already is (a retry changes nothing)."""
    if state == "cleared":
        raise Conflict(f"alert {alert_id} has cleared; there is nothing to acknowledge")
    if state == "acknowledged":
        return None
    return Change("acknowledged", "acknowledged")


def shelve(alert_id: int, state: str, *, until_us: int, now_us: int) -> Change:
    """A person shelves an open alert until a time in the future."""
    if until_us <= now_us:
        raise InvalidInput(
            "until must lie in the future", [Detail(field="until", reason="not after now")]
        )
    if state == "cleared":
        raise Conflict(f"alert {alert_id} has cleared; there is nothing to shelve")
    return Change("shelved", "shelved")
