"""The demo's data: deterministic, calibrated where it should be, and a real storm.

Invented data is for the demo only (the team's rule); these tests check that the
story the demo tells is true of the data it sends, with figures computed here
from the generated rows, not taken from the generator's own constants.
"""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
from demo_feed.scenario import (
    HISTORY_DAYS,
    REGIONS,
    STORM_REGION,
    STORM_START,
    Day,
    Scenario,
)
from sklearn.calibration import calibration_curve

from plumbwatch.stats.evidence import MixtureEvidence, log_threshold

ANCHOR = datetime(2026, 12, 1, 15, 30, tzinfo=UTC)
STORM = [r[0] for r in REGIONS].index(STORM_REGION)
HORIZON_DAYS = 7


@pytest.fixture(scope="module")
def days() -> list[Day]:
    scenario = Scenario.ending_today(ANCHOR)
    return [scenario.day(i) for i in range(HISTORY_DAYS + 1)]


def pooled(days: list[Day], first: int, last: int, region: int | None = None):
    chosen = days[first:last]
    late = np.concatenate([d.late for d in chosen])
    p = np.concatenate([d.p_late for d in chosen])
    where = np.concatenate([d.region for d in chosen])
    keep = np.ones(late.size, bool) if region is None else where == region
    return late[keep].astype(float), p[keep]


def log_oe(late: np.ndarray, p: np.ndarray) -> float:
    return float(np.log(late.mean() / p.mean()))


def ece(late: np.ndarray, p: np.ndarray) -> float:
    """Equal-width 10-bin ECE (Guo et al. 2017), per-bin means from scikit-learn."""
    observed, predicted = calibration_curve(late, p, n_bins=10, strategy="uniform")
    counts = np.bincount(np.minimum((p * 10).astype(int), 9), minlength=10)
    weights = counts[counts > 0] / p.size
    return float(np.sum(weights * np.abs(observed - predicted)))


def test_the_same_seed_gives_the_same_parcels() -> None:
    a = Scenario.ending_today(ANCHOR).day(37)
    b = Scenario.ending_today(ANCHOR).day(37)
    assert a.ids == b.ids and a.late_predictions() == b.late_predictions()
    assert a.late_outcomes(0, 2**40) == b.late_outcomes(0, 2**40)
    assert a.claim_outcomes(0, 2**40) == b.claim_outcomes(0, 2**40)
    other = Scenario.ending_today(ANCHOR, seed=7).day(37)
    assert other.late_predictions() != a.late_predictions()


def test_outcomes_arrive_within_each_models_horizon(days: list[Day]) -> None:
    for d in days[::9]:
        assert np.all(d.delivered > d.dispatched)
        assert np.all(d.delivered - d.dispatched < HORIZON_DAYS * 86_400)
        claimed = d.claimed[d.insured & d.claim]
        assert np.all(claimed - d.dispatched[d.insured & d.claim] < 30 * 86_400)
    late_p = days[3].late_predictions()
    assert late_p[0]["predicted_at"].endswith("Z") and 0 < late_p[0]["probability"] < 1


def test_before_the_storm_every_region_is_calibrated(days: list[Day]) -> None:
    for region in range(len(REGIONS)):
        late, p = pooled(days, 0, STORM_START, region)
        # Binomial noise only: within three standard errors of log O/E.
        se = np.sqrt((1 - p.mean()) / (p.size * p.mean()))
        assert abs(log_oe(late, p)) < 3 * se, REGIONS[region][0]


def test_the_storm_region_drifts_materially_in_its_last_matured_week(days: list[Day]) -> None:
    last = HISTORY_DAYS - HORIZON_DAYS  # the newest matured cohort day at the end
    late, p = pooled(days, last - 7, last, STORM)
    assert late.size > 600 and late.sum() >= 100  # enough events for a verdict
    assert log_oe(late, p) > 0.6  # materiality tolerance 0.1
    assert ece(late, p) > 0.12  # materiality tolerance 0.03


def test_the_overall_rate_barely_moves(days: list[Day]) -> None:
    before, _ = pooled(days, 0, STORM_START)
    during, _ = pooled(days, STORM_START + 8, HISTORY_DAYS - HORIZON_DAYS)
    assert abs(during.mean() - before.mean()) < 0.005
    # and no 7-day window of the whole history looks miscalibrated overall
    for end in range(7, HISTORY_DAYS - HORIZON_DAYS + 1):
        late, p = pooled(days, end - 7, end)
        assert abs(log_oe(late, p)) < 0.09 and ece(late, p) < 0.03, end


def test_evidence_crosses_the_paging_threshold_only_in_the_storm_region(days: list[Day]) -> None:
    # Bonferroni over K = 60 slices at alpha 0.01 (METHODS.md section 7.4): log(6000).
    threshold = log_threshold(alpha=0.01, n_slices=60)
    crossed: dict[str, int | None] = {}
    for name, region in [("overall", None)] + [(r[0], k) for k, r in enumerate(REGIONS)]:
        state, crossed[name] = MixtureEvidence.start(), None
        for d in days[: HISTORY_DAYS - HORIZON_DAYS]:  # rows matured by the end, in order
            keep = np.ones(len(d), bool) if region is None else d.region == region
            state, path = state.update_with_path(d.late[keep].astype(float), d.p_late[keep])
            if crossed[name] is None and path.size and path.max() >= threshold:
                crossed[name] = d.index
    storm_day = crossed.pop(STORM_REGION)
    assert storm_day is not None and STORM_START < storm_day <= STORM_START + 12
    assert crossed == dict.fromkeys(crossed)  # nobody else crosses


def test_a_shorter_history_still_shows_the_storm() -> None:
    # `--history-days 60` for a slower machine: the storm is placed from the end.
    history = 60
    scenario = Scenario.ending_today(ANCHOR, history_days=history)
    state = MixtureEvidence.start()
    threshold = log_threshold(alpha=0.01, n_slices=60)
    crossed = None
    for d in scenario.days(0, history - HORIZON_DAYS - 1):
        keep = d.region == STORM
        state, path = state.update_with_path(d.late[keep].astype(float), d.p_late[keep])
        if crossed is None and path.size and path.max() >= threshold:
            crossed = d.index
    assert crossed is not None and crossed < history - HORIZON_DAYS
