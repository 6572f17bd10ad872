"""The pure lifecycle: hysteresis, one open alert per slice, shelves and their expiry,
acknowledgement."""

from __future__ import annotations

import pytest

from plumbwatch.alerts import lifecycle
from plumbwatch.alerts.lifecycle import Open, Track
from plumbwatch.errors import Conflict, InvalidInput


def run(verdicts: list[bool], *, raise_after: int = 2, clear_after: int = 3) -> list[str]:
    """Feed a sequence of verdicts through the lifecycle; return each step's change."""
    track, alert, out = Track(), None, []
    for holds in verdicts:
        track, change = lifecycle.step(
            track, holds, alert, raise_after=raise_after, clear_after=clear_after, now_us=0
        )
        out.append(change.kind if change else "-")
        if change is not None:
            alert = None if change.to_state == "cleared" else Open(change.to_state)
    return out


def test_raises_after_consecutive_evaluations_only() -> None:
    assert run([True, False, True, False, True]) == ["-"] * 5
    assert run([True, True]) == ["-", "raised"]
    assert run([True, True], raise_after=1) == ["raised", "-"]


def test_one_open_alert_per_slice_and_clears_after_consecutive_calm() -> None:
    # Once raised, holding again raises nothing; calm must last clear_after evaluations.
    seq = [True, True, True, True, False, False, True, False, False, False]
    assert run(seq) == ["-", "raised", "-", "-", "-", "-", "-", "-", "-", "cleared"]


def test_re_raised_only_after_it_cleared() -> None:
    seq = [True, True, False, False, False, True, True]
    assert run(seq) == ["-", "raised", "-", "-", "cleared", "-", "raised"]


def test_acknowledged_alert_still_clears_and_is_not_raised_twice() -> None:
    track = Track(hold=5, holding=True)
    alert = Open("acknowledged")
    track, change = lifecycle.step(track, True, alert, raise_after=1, clear_after=1, now_us=0)
    assert change is None
    _, change = lifecycle.step(track, False, alert, raise_after=1, clear_after=1, now_us=0)
    assert change == lifecycle.CLEARED


def test_shelf_expiry_takes_the_state_of_the_condition() -> None:
    shelved = Open("shelved", shelved_until_us=100)
    # Before the time: quiet, even while the condition holds.
    _, change = lifecycle.step(Track(), True, shelved, raise_after=1, clear_after=1, now_us=99)
    assert change is None
    # At the time, still holding: active again, and on-call hears of it.
    _, change = lifecycle.step(Track(), True, shelved, raise_after=1, clear_after=5, now_us=100)
    assert change == lifecycle.REACTIVATED and change.notify
    # At the time, no longer holding: cleared, whatever the clear count.
    _, change = lifecycle.step(Track(), False, shelved, raise_after=1, clear_after=5, now_us=100)
    assert change == lifecycle.CLEARED


def test_clearing_on_the_shelf_is_quiet() -> None:
    shelved = Open("shelved", shelved_until_us=10**9)
    _, change = lifecycle.step(
        Track(calm=2), False, shelved, raise_after=1, clear_after=3, now_us=0
    )
    assert change == lifecycle.CLEARED_ON_SHELF and not change.notify


def test_acknowledge() -> None:
    assert lifecycle.acknowledge(1, "active") == lifecycle.Change("acknowledged", "acknowledged")
    assert lifecycle.acknowledge(1, "acknowledged") is None  # a retry changes nothing
    assert lifecycle.acknowledge(1, "shelved") is not None
    with pytest.raises(Conflict, match="cleared"):
        lifecycle.acknowledge(1, "cleared")


def test_shelve() -> None:
    assert lifecycle.shelve(1, "active", until_us=2, now_us=1).to_state == "shelved"
    with pytest.raises(InvalidInput, match="future"):
        lifecycle.shelve(1, "active", until_us=1, now_us=1)
    with pytest.raises(Conflict, match="cleared"):
        lifecycle.shelve(1, "cleared", until_us=2, now_us=1)
