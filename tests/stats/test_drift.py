"""PSI, KS and Jensen–Shannon (plumbwatch.stats.drift)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import jensenshannon

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.drift import (
    coarsen_to_reference_quantiles,
    jensen_shannon,
    ks_from_counts,
    ks_test,
    psi,
    psi_from_counts,
    psi_from_histograms,
)
from plumbwatch.stats.grid import GRID_EDGES, N_BINS, bin_index

J1_E = np.array([0.1, 0.2, 0.3, 0.4])
J1_A = np.array([0.15, 0.25, 0.25, 0.35])


def test_j1_psi_and_js() -> None:
    # METHODS.md §15 row J1 (hand; JS also scipy jensenshannon).
    res = psi_from_counts(J1_E * 1000, J1_A * 1000)
    assert res.psi == pytest.approx(0.04722308044204256, rel=1e-12)
    assert res.n_bins == 4 and res.floor == 1e-4
    kl = lambda x, y: float(np.sum(x * np.log(x / y)))  # noqa: E731
    assert res.psi == pytest.approx(kl(J1_A, J1_E) + kl(J1_E, J1_A), rel=1e-12)
    assert jensen_shannon(J1_E, J1_A) == pytest.approx(0.07668497816148617, rel=1e-12)
    # Null quantile: chi2_{B-1} 0.95 quantile times (1/N + 1/M).
    assert res.null_quantile == pytest.approx(stats.chi2.ppf(0.95, 3) * 2 / 1000, rel=1e-12)
    assert res.exceeds == (res.psi > res.null_quantile)


def test_js_matches_scipy_with_empty_bins_and_unnormalised_input() -> None:
    rng = np.random.default_rng(0)
    for _ in range(20):
        a = rng.integers(0, 5, 12).astype(float)
        b = rng.integers(0, 5, 12).astype(float)
        a[0] += 1
        b[1] += 1
        assert jensen_shannon(a, b) == pytest.approx(float(jensenshannon(a, b)), rel=1e-10)
    assert jensen_shannon([1, 0], [0, 1]) == pytest.approx(math.sqrt(math.log(2)), rel=1e-12)


def _psi_histogram(ref: np.ndarray, cur: np.ndarray, n_bins: int, eps: float) -> float:
    # Independent version with np.histogram on -inf/inf-padded quantile edges, as in
    # methods/checks/verify_j.py.
    edges = np.quantile(ref, np.linspace(0, 1, n_bins + 1))
    edges[0], edges[-1] = -np.inf, np.inf
    edges = np.unique(edges)
    r = np.maximum(np.histogram(ref, edges)[0] / len(ref), eps)
    c = np.maximum(np.histogram(cur, edges)[0] / len(cur), eps)
    return float(np.sum((c - r) * np.log(c / r)))


def test_psi_raw_matches_independent_histogram_version() -> None:
    rng = np.random.default_rng(1)
    ref, cur = rng.beta(2, 5, 3000), rng.beta(2.6, 5, 2500)
    res = psi(ref, cur)
    assert res.psi == pytest.approx(_psi_histogram(ref, cur, 10, 1e-4), rel=1e-12)
    assert res.n_bins == 10 and res.exceeds
    # Current values outside the reference range land in an end bin, never lost.
    res2 = psi(ref, np.concatenate([cur, [0.0, 1.0]]))
    assert res2.n_current == cur.size + 2


def test_psi_empty_bin_is_floored() -> None:
    res = psi_from_counts([50, 50, 0], [40, 40, 20], floor=1e-4)
    e = np.array([0.5, 0.5, 1e-4])
    a = np.array([0.4, 0.4, 0.2])
    assert res.psi == pytest.approx(float(np.sum((a - e) * np.log(a / e))), rel=1e-12)


def test_j3_psi_null_mean_and_quantile() -> None:
    # METHODS.md §15 row J3 (simulation): N = M = 2000, B = 10, mean ≈ (B-1)(1/N+1/M)
    # = 0.009; the 95 % null quantile should be exceeded about 5 % of the time.
    rng = np.random.default_rng(3)
    sims = 1500
    vals, exceed = np.empty(sims), np.empty(sims, bool)
    for i in range(sims):
        r = psi(rng.beta(2, 5, 2000), rng.beta(2, 5, 2000))
        vals[i], exceed[i] = r.psi, r.exceeds
    assert vals.mean() == pytest.approx(9 * (2 / 2000), rel=0.05)
    assert abs(exceed.mean() - 0.05) < 3 * math.sqrt(0.05 * 0.95 / sims)


def test_psi_from_fine_grid_histograms() -> None:
    rng = np.random.default_rng(4)
    ref, cur = rng.beta(2, 5, 20000), rng.beta(2.3, 5, 8000)
    rc = np.bincount(bin_index(ref), minlength=N_BINS)
    cc = np.bincount(bin_index(cur), minlength=N_BINS)
    group = coarsen_to_reference_quantiles(rc, n_bins=10)
    assert group.shape == (N_BINS,) and np.all(np.diff(group) >= 0)
    shares = np.bincount(group, weights=rc) / rc.sum()
    assert shares.size == 10
    # Each coarse share is 1/10 give or take the heaviest fine bin.
    assert np.all(np.abs(shares - 0.1) <= (rc / rc.sum()).max() + 1e-12)
    grid = psi_from_histograms(rc, cc, n_bins=10)
    exact = psi(ref, cur)
    assert grid.n_bins == 10
    # Same statistic on slightly moved edges: agree to a few percent here.
    assert grid.psi == pytest.approx(exact.psi, rel=0.1)


def test_ks_raw_equals_scipy() -> None:
    rng = np.random.default_rng(5)
    for n1, n2 in ((300, 500), (5000, 5000), (12000, 9000)):
        a, b = rng.beta(2, 5, n1), rng.beta(2.3, 5, n2)
        ours, ref = ks_test(a, b), stats.ks_2samp(a, b)
        assert ours.statistic == ref.statistic and ours.p_value == ref.pvalue


def test_ks_from_counts_is_exact_when_values_sit_on_left_edges() -> None:
    # Values equal to bin left edges: the CDFs only jump at edges, so the grid statistic
    # is exact and the p-value is scipy's asymptotic mode (within the Stephens-corrected
    # limit's error at this size, en = 1714: see the next test).
    rng = np.random.default_rng(6)
    a = GRID_EDGES[bin_index(rng.beta(2, 5, 4000))]
    b = GRID_EDGES[bin_index(rng.beta(2.2, 5, 3000))]
    res = ks_from_counts(
        np.bincount(bin_index(a), minlength=N_BINS), np.bincount(bin_index(b), minlength=N_BINS)
    )
    ref = stats.ks_2samp(a, b, method="asymp")
    assert res.statistic == pytest.approx(float(ref.statistic), rel=1e-12)
    assert res.p_value == pytest.approx(float(ref.pvalue), abs=5e-3)
    small = ks_from_counts(
        np.bincount(bin_index(a[:900]), minlength=N_BINS),
        np.bincount(bin_index(b[:900]), minlength=N_BINS),
    )
    exact = stats.ks_2samp(a[:900], b[:900], method="asymp")  # en = 450: scipy's formula
    assert small.p_value == pytest.approx(float(exact.pvalue), rel=1e-9)


@pytest.mark.parametrize(("n", "tolerance"), [(3_000, 5e-3), (60_000, 1e-3)])
def test_ks_p_value_of_large_samples_is_close_to_scipy(n: int, tolerance: float) -> None:
    # Past an effective size of 1,000 the limiting distribution with Stephens' correction
    # stands in for scipy's kstwo (which takes milliseconds to seconds there); scipy's
    # ks_2samp(method="asymp") is the reference, on values sitting on grid edges so that
    # both statistics are exact.
    rng = np.random.default_rng(8)
    for shift in (2.0, 2.02, 2.05, 2.1):
        a = GRID_EDGES[bin_index(rng.beta(2, 5, n))]
        b = GRID_EDGES[bin_index(rng.beta(shift, 5, 2 * n // 3))]
        res = ks_from_counts(
            np.bincount(bin_index(a), minlength=N_BINS),
            np.bincount(bin_index(b), minlength=N_BINS),
        )
        ref = stats.ks_2samp(a, b, method="asymp")
        assert res.statistic == pytest.approx(float(ref.statistic), rel=1e-12)
        assert res.p_value == pytest.approx(float(ref.pvalue), abs=tolerance)


@pytest.mark.parametrize("bins", [10, 40, N_BINS])
def test_ks_from_counts_bounds_the_exact_statistic(bins: int) -> None:
    rng = np.random.default_rng(bins)
    for _ in range(20):
        a, b = rng.beta(2, 5, 700), rng.beta(2, 4.5, 900)
        if bins == N_BINS:
            ia, ib = bin_index(a), bin_index(b)
        else:
            ia, ib = (
                np.minimum((a * bins).astype(int), bins - 1),
                np.minimum((b * bins).astype(int), bins - 1),
            )
        ca, cb = np.bincount(ia, minlength=bins), np.bincount(ib, minlength=bins)
        res = ks_from_counts(ca, cb)
        exact = float(stats.ks_2samp(a, b).statistic)
        assert res.statistic <= exact + 1e-12 <= res.statistic_upper + 2e-12
        assert exact - res.statistic <= max((ca / ca.sum()).max(), (cb / cb.sum()).max()) + 1e-12


def test_errors_and_undefined() -> None:
    with pytest.raises(ValueError, match="same bins"):
        psi_from_counts([1, 2], [1, 2, 3])
    with pytest.raises(ValueError, match="reference_counts"):
        psi_from_counts([-1, 2], [1, 2])
    with pytest.raises(ValueError, match="current"):
        psi([0.1, 0.2], [0.1, 1.5])
    with pytest.raises(ValueError, match="floor"):
        psi_from_counts([1, 2], [1, 2], floor=0)
    with pytest.raises(Undefined) as e1:
        psi_from_counts([0, 0], [1, 2])
    assert e1.value.reason == "empty_sample"
    with pytest.raises(Undefined) as e2:
        psi_from_counts([5, 0], [3, 0])
    assert e2.value.reason == "one_bin"
    with pytest.raises(Undefined):
        ks_test([], [0.5])
    with pytest.raises(Undefined):
        psi([0.5] * 10, [0.5] * 10)  # one distinct reference value: a single bin
