"""PAV, CORP decomposition and reliability curves."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.isotonic import IsotonicRegression

from plumbwatch.stats.corp import (
    corp_decomposition,
    corp_decomposition_from_sketch,
    isotonic_calibration,
    pav_grouped,
    reliability_curve,
    reliability_curve_from_sketch,
)
from plumbwatch.stats.scores import brier_decomposition, brier_score, log_loss
from plumbwatch.stats.sketch import Sketch


def test_d5_pav_with_ties() -> None:
    # METHODS.md §15 D5 (REF: sklearn IsotonicRegression).
    fit = isotonic_calibration([0, 1, 1, 0, 0, 1], [0.2, 0.2, 0.2, 0.5, 0.5, 0.8])
    np.testing.assert_allclose(fit, [0.4, 0.4, 0.4, 0.4, 0.4, 1.0], rtol=1e-12)


def test_python_pav_equals_compiled() -> None:
    import plumbwatch.stats.corp as corp

    rng = np.random.default_rng(3)
    v, w = rng.random(500), rng.random(500) + 0.1
    compiled = pav_grouped(v, w)
    saved, corp._scipy_pav = corp._scipy_pav, None
    try:
        np.testing.assert_allclose(pav_grouped(v, w), compiled, rtol=1e-12)
    finally:
        corp._scipy_pav = saved


@pytest.mark.parametrize("which", ["d2", "breast_cancer_probs"])
def test_pav_matches_sklearn(which: str, request: pytest.FixtureRequest) -> None:
    data = request.getfixturevalue(which)
    y, p = (data["y"], data["p"]) if which == "d2" else data
    ref = IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").fit(p, y).predict(p)
    np.testing.assert_allclose(isotonic_calibration(y, p), ref, atol=1e-12)


def test_d2_decomposition(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §6 / §15 D2 (REF: sklearn IsotonicRegression + xlogy).
    r = corp_decomposition(d2["y"], d2["p"])
    assert r.brier.mcb == pytest.approx(0.008327579639314076, rel=1e-9)
    assert r.brier.dsc == pytest.approx(0.054939591766966916, rel=1e-12)
    assert r.brier.unc == pytest.approx(0.232311, rel=1e-12)
    assert r.brier.score == pytest.approx(0.18569898787234712, rel=1e-12)
    assert r.log.mcb == pytest.approx(0.024321257589315026, rel=1e-9)
    assert r.log.dsc == pytest.approx(0.12699461057357686, rel=1e-12)
    assert r.log.unc == pytest.approx(0.6573397035288463, rel=1e-12)
    assert r.log.score == pytest.approx(0.5546663505445845, rel=1e-12)
    for d in (r.brier, r.log):
        assert d.mcb - d.dsc + d.unc == pytest.approx(d.score, rel=1e-12)


def test_murphy_relation_on_monotone_discrete_forecasts() -> None:
    # With discrete forecasts whose observed frequencies already increase, PAV returns
    # the bin means, so MCB = REL and DSC = RES (METHODS.md §6).
    p = np.repeat([0.1, 0.3, 0.6, 0.8], [10, 10, 10, 10])
    y = np.concatenate(
        [
            np.r_[np.ones(2), np.zeros(8)],
            np.r_[np.ones(3), np.zeros(7)],
            np.r_[np.ones(5), np.zeros(5)],
            np.r_[np.ones(9), np.zeros(1)],
        ]
    )
    d = corp_decomposition(y, p)
    m = brier_decomposition(y, p, n_bins=None)
    assert d.brier.mcb == pytest.approx(m.reliability, rel=1e-12)
    assert d.brier.dsc == pytest.approx(m.resolution, rel=1e-12)


def test_sketch_decomposition_is_below_raw(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(20_000, 40, a=0.2, b=0.8)
    raw = corp_decomposition(y, p)
    grid = corp_decomposition_from_sketch(Sketch.from_arrays(y, p))
    for r, g, score in (
        (raw.brier, grid.brier, brier_score(y, p)),
        (raw.log, grid.log, log_loss(y, p)),
    ):
        assert g.score == pytest.approx(score, rel=1e-12)
        assert g.unc == pytest.approx(r.unc, rel=1e-12)
        assert g.mcb <= r.mcb + 1e-12 and g.dsc <= r.dsc + 1e-12
        assert g.mcb - g.dsc + g.unc == pytest.approx(g.score, rel=1e-12)
        # Loss of fit from pooling within grid bins, seen empirically (not a bound).
        assert r.dsc - g.dsc < 2e-3


def test_reliability_curve_band(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(3000, 41)
    c = reliability_curve(y, p, n_resamples=100, seed=7)
    again = reliability_curve(y, p, n_resamples=100, seed=7)
    np.testing.assert_array_equal(c.band_low, again.band_low)
    assert np.all(np.diff(c.fitted) >= -1e-15)
    assert np.all(c.band_low <= c.band_high)
    # Calibrated data: the curve stays inside its 90 % consistency band for most points.
    inside = (c.fitted >= c.band_low - 1e-12) & (c.fitted <= c.band_high + 1e-12)
    assert np.average(inside, weights=c.weight) > 0.8
    s = reliability_curve_from_sketch(Sketch.from_arrays(y, p), n_resamples=50)
    assert s.forecast.size <= 1402 and np.all(np.diff(s.forecast) > 0)
