"""Cohorts, maturity and windows (DESIGN.md "Evaluation semantics").

A prediction belongs to the cohort of its UTC day and matures at
``predicted_at + label_horizon``. Its outcome counts only if observed within
the horizon; one observed later is ``late``: counted, never folded in. With
``missing_outcome = wait`` a matured row without an in-horizon outcome is left
out (and counted); with ``negative`` it counts as 0.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

DAY_US = 86_400 * 1_000_000


def day_of(instant_us: int) -> int:
    return instant_us // DAY_US


@dataclass(frozen=True, slots=True)
class RowState:
    """What one matured row contributes: in the sketch with outcome y, or only to counts."""

    included: bool
    y: int
    late: int
    unlabelled: int


NOT_MATURED = RowState(False, 0, 0, 0)


def classify(
    *,
    outcome: int | None,
    observed_at_us: int | None,
    predicted_at_us: int,
    horizon_us: int,
    missing_negative: bool,
) -> RowState:
    """The state of a matured binary row given its current outcome (or none)."""
    if outcome is not None and observed_at_us is not None:
        if observed_at_us <= predicted_at_us + horizon_us:
            return RowState(True, outcome, 0, 0)
        # Observed after the horizon: by maturity the row had no outcome.
        return RowState(missing_negative, 0, 1, 0)
    return RowState(missing_negative, 0, 0, 1)


def state_lookup(
    *, horizon_us: int, missing_negative: bool
) -> Callable[[int, int | None, int | None], RowState]:
    """``classify`` as ``state_of(predicted_at, outcome, observed_at)``, looked up by
    (outcome, observed within the horizon): a pass over millions of rows meets only a
    handful of states, so each is classified once."""
    known: dict[tuple[int | None, bool], RowState] = {}

    def state_of(at: int, outcome: int | None, observed: int | None) -> RowState:
        if outcome is None or observed is None:
            key: tuple[int | None, bool] = (None, False)
        else:
            key = (outcome, observed <= at + horizon_us)
        state = known.get(key)
        if state is None:
            state = known[key] = classify(
                outcome=outcome,
                observed_at_us=observed,
                predicted_at_us=at,
                horizon_us=horizon_us,
                missing_negative=missing_negative,
            )
        return state

    return state_of


@dataclass(frozen=True)
class Window:
    """Whole UTC days of matured cohorts: days [first_day, end_day)."""

    name: str
    first_day: int
    end_day: int

    @property
    def start_us(self) -> int:
        return self.first_day * DAY_US

    @property
    def end_us(self) -> int:
        return self.end_day * DAY_US


def frontier(as_of_us: int, horizon_us: int) -> int:
    """Predictions made at or before this instant have matured by ``as_of``."""
    return as_of_us - horizon_us


def window(name: str, days: int, *, frontier_us: int) -> Window:
    """The most recent ``days`` whole cohort days that have fully matured."""
    end_day = (frontier_us + 1) // DAY_US  # day d is complete when (d + 1) * DAY <= frontier + 1
    return Window(name, end_day - days, end_day)
