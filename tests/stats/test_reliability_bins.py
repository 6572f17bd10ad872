"""Reliability points, Wilson intervals and forecast histograms from a sketch."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from plumbwatch.stats.calibration import equal_width_bins, expected_calibration_error
from plumbwatch.stats.reliability_bins import (
    binned_reliability_from_sketch,
    forecast_histogram_from_sketch,
    forecast_quantile_from_sketch,
    wilson_interval,
)
from plumbwatch.stats.sketch import Sketch


@pytest.mark.parametrize(("k", "n"), [(0, 10), (3, 10), (10, 10), (57, 400), (1, 2)])
def test_wilson_matches_statsmodels(k: int, n: int) -> None:
    # statsmodels.stats.proportion.proportion_confint(method="wilson") is the reference.
    low, high = wilson_interval(k, n, level=0.95)
    ref_low, ref_high = proportion_confint(k, n, alpha=0.05, method="wilson")
    assert float(low) == pytest.approx(ref_low, abs=1e-12)
    assert float(high) == pytest.approx(ref_high, abs=1e-12)


def test_wilson_of_an_empty_bin_is_nan() -> None:
    low, high = wilson_interval(np.array([0.0]), np.array([0.0]))
    assert np.isnan(low[0]) and np.isnan(high[0])


def test_bins_equal_the_rows_they_summarise() -> None:
    rng = np.random.default_rng(11)
    p = rng.beta(2, 5, size=4000)
    y = (rng.random(p.size) < np.clip(p * 1.2, 0, 1)).astype(float)
    bins = binned_reliability_from_sketch(Sketch.from_arrays(y, p), n_bins=10)
    # Recomputed on the raw rows with the equal-width rule of METHODS.md 2.1.
    b = equal_width_bins(p, 10)
    for k in range(10):
        rows = b == k
        assert bins.count[k] == rows.sum()
        if rows.any():
            assert bins.mean_predicted[k] == pytest.approx(p[rows].mean(), rel=1e-12)
            assert bins.observed_rate[k] == pytest.approx(y[rows].mean(), rel=1e-12)
            ref = proportion_confint(y[rows].sum(), rows.sum(), alpha=0.05, method="wilson")
            assert (bins.ci_low[k], bins.ci_high[k]) == pytest.approx(ref, abs=1e-12)
        else:
            assert np.isnan(bins.observed_rate[k])
    # The count-weighted gap of the bins is the reported ECE.
    keep = bins.count > 0
    gap = np.sum(bins.count[keep] * np.abs(bins.observed_rate[keep] - bins.mean_predicted[keep]))
    assert gap / bins.count.sum() == pytest.approx(expected_calibration_error(y, p), rel=1e-12)


def test_histogram_counts_every_row_within_one_grid_bin_of_the_edges() -> None:
    rng = np.random.default_rng(5)
    p = rng.uniform(0, 1, size=3000)
    y = (rng.random(p.size) < p).astype(float)
    edges, counts = forecast_histogram_from_sketch(Sketch.from_arrays(y, p), n_bins=20)
    assert counts.sum() == p.size
    ref, _ = np.histogram(p, bins=edges)  # numpy's histogram on the raw rows
    # Grid bins near 0.5 are about 0.005 wide: rows that close to an edge may move one bin.
    near_edge = np.min(np.abs(p[:, None] - edges[None, 1:-1]), axis=1) < 0.006
    assert np.abs(counts - ref).sum() <= 2 * near_edge.sum()


def test_histogram_with_a_zoomed_range_puts_the_rest_in_the_last_bin() -> None:
    p = np.array([0.01, 0.02, 0.03, 0.5, 0.9])
    _, counts = forecast_histogram_from_sketch(Sketch.from_arrays(np.zeros(5), p), upper=0.05)
    assert counts.sum() == 5 and counts[-1] == 2


def test_quantile_is_an_upper_grid_edge() -> None:
    p = np.linspace(0.001, 0.02, 200)
    q = forecast_quantile_from_sketch(Sketch.from_arrays(np.zeros(200), p), 0.995)
    assert 0.02 <= q < 0.0205


def test_zoomed_bins_place_grid_bins_by_their_mean_forecast() -> None:
    rng = np.random.default_rng(3)
    p = rng.uniform(0.0, 0.08, size=3000)
    y = (rng.random(p.size) < p).astype(float)
    bins = binned_reliability_from_sketch(Sketch.from_arrays(y, p), n_bins=8, upper=0.08)
    assert bins.count.sum() == p.size
    assert bins.high[-1] == pytest.approx(0.08)
    # Against numpy's histogram of the raw rows: only rows next to an edge may move.
    ref, _ = np.histogram(p, bins=np.linspace(0, 0.08, 9))
    near_edge = np.min(np.abs(p[:, None] - np.linspace(0, 0.08, 9)[None, 1:-1]), axis=1) < 1e-3
    assert np.abs(bins.count - ref).sum() <= 2 * near_edge.sum()
