"""ECE family, Hosmer–Lemeshow, Spiegelhalter and O/E: check values and validity."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps
from sklearn.calibration import calibration_curve

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.calibration import (
    equal_mass_groups,
    equal_width_bins,
    expected_calibration_error,
    hosmer_lemeshow,
    l2_calibration_error,
    observed_expected,
    spiegelhalter_z,
)

C1_P = [0.05, 0.15, 0.15, 0.25, 0.55, 0.65, 0.95, 0.95]
C1_Y = [0, 0, 1, 0, 1, 0, 1, 1]


def _relplot_binned_ece():  # type: ignore[no-untyped-def]
    relplot = pytest.importorskip("relplot")
    return relplot.metrics.binnedECE


def test_c1_ece() -> None:
    # METHODS.md §15 C1: 0.275 (netcal ECE(bins=10) = hand); relplot agrees off-edge.
    assert expected_calibration_error(C1_Y, C1_P) == pytest.approx(0.275, rel=1e-12)
    binned = _relplot_binned_ece()
    assert expected_calibration_error(C1_Y, C1_P) == pytest.approx(
        binned(np.array(C1_P), np.array(C1_Y), nbins=10), rel=1e-12
    )


def test_c2_edge_convention() -> None:
    # METHODS.md §15 C2: our rule floor(p*B) gives 0.35; linspace/int-division
    # libraries give 0.25 because 0.3 (and p = 1.0) land in other bins.
    p = [0.1, 0.1, 0.2, 0.2, 0.3, 1.0, 1.0, 0.9]
    y = [0, 1, 0, 0, 1, 1, 1, 0]
    assert expected_calibration_error(y, p) == pytest.approx(0.35, rel=1e-12)
    binned = _relplot_binned_ece()
    assert binned(np.array(p), np.array(y), nbins=10) == pytest.approx(0.25, rel=1e-12)
    assert equal_width_bins(np.array([0.3, 1.0, 0.0, 0.8999999999999999]), 10).tolist() == [
        3,
        9,
        0,
        9,
    ]


def test_c3_values(c3) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §15 C3 (REF: netcal = relplot binnedECE = hand; debiased/plug-in HAND).
    p, y = c3["p"], c3["y_miscal"]
    assert expected_calibration_error(y, p) == pytest.approx(0.032727333449718, rel=1e-12)
    assert expected_calibration_error(y, p, n_bins=15) == pytest.approx(
        0.033662182192214, rel=1e-12
    )
    assert expected_calibration_error(y, p, strategy="quantile") == pytest.approx(
        0.0355961578267234, rel=1e-12
    )
    assert l2_calibration_error(y, p) == pytest.approx(0.039048776124469366, rel=1e-12)
    assert l2_calibration_error(y, p) ** 2 == pytest.approx(0.0015248069168189288, rel=1e-11)
    assert l2_calibration_error(y, p, debiased=False) == pytest.approx(
        0.042740039156980866, rel=1e-12
    )
    binned = _relplot_binned_ece()
    assert expected_calibration_error(y, p) == pytest.approx(binned(p, y, nbins=10), rel=1e-12)
    # METHODS.md §15 C3c: the calibrated control.
    assert expected_calibration_error(c3["y_calibrated"], p) == pytest.approx(
        0.016236523740099224, rel=1e-12
    )


def test_bin_means_match_sklearn_calibration_curve(c3) -> None:  # type: ignore[no-untyped-def]
    # calibration_curve bins are right-closed; C3 has no value on an edge.
    p, y = c3["p"], c3["y_miscal"]
    assert not np.any(np.isin(p, np.arange(11) / 10))
    prob_true, prob_pred = calibration_curve(y, p, n_bins=10)
    b = equal_width_bins(p, 10)
    counts = np.bincount(b, minlength=10)
    keep = counts > 0
    np.testing.assert_allclose(
        np.bincount(b, weights=y, minlength=10)[keep] / counts[keep], prob_true, rtol=1e-12
    )
    np.testing.assert_allclose(
        np.bincount(b, weights=p, minlength=10)[keep] / counts[keep], prob_pred, rtol=1e-12
    )


def test_equal_mass_never_splits_ties() -> None:
    p = np.array([0.1] * 7 + [0.2] * 2 + [0.3])
    g = equal_mass_groups(p, np.ones(10), 5)
    for v in (0.1, 0.2):
        assert len(set(g[p == v].tolist())) == 1
    assert g.max() + 1 < 5


def test_d1_spiegelhalter_rufibach() -> None:
    # Rufibach 2010, J Clin Epidemiol 63(8), Table 1: Z 1.06 and 1.22 (tolerance 0.005).
    assert spiegelhalter_z([1, 0], [0.2, 0.2]).z == pytest.approx(1.06, abs=0.005)
    assert spiegelhalter_z([1, 0], [0.4, 0.5]).z == pytest.approx(1.22, abs=0.005)
    assert spiegelhalter_z([1, 0], [0.2, 0.2]).z == pytest.approx(1.0606601717798212, rel=1e-12)


def test_d2_hosmer_lemeshow_and_spiegelhalter(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §15 D2 (HAND): Ĉ 27.070116371274114; p at df 10 and (development) df 8.
    hl = hosmer_lemeshow(d2["y"], d2["p"])
    assert hl.statistic == pytest.approx(27.070116371274114, rel=1e-12)
    assert (hl.df, hl.n_groups) == (10, 10)
    assert hl.p_value == pytest.approx(0.0025386366068500177, rel=1e-9)
    dev = hosmer_lemeshow(d2["y"], d2["p"], dof="development")
    assert dev.df == 8 and dev.p_value == pytest.approx(0.000687543837511488, rel=1e-9)
    assert hl.p_value == pytest.approx(sps.chi2.sf(hl.statistic, 10), rel=1e-12)
    sp = spiegelhalter_z(d2["y"], d2["p"])
    assert sp.z == pytest.approx(2.5232264887977487, rel=1e-12)
    assert sp.p_value == pytest.approx(0.011628347965862144, rel=1e-9)


def test_d2_observed_expected(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §5.3 table (HAND / scipy chi2), given to the digits printed there.
    r = observed_expected(d2["y"], d2["p"])
    assert r.observed == 367 and r.expected == pytest.approx(316.95395517918314, rel=1e-12)
    assert r.ratio == pytest.approx(1.1578968932333544, rel=1e-12)
    assert r.z == pytest.approx(3.8326, abs=5e-5)
    assert (r.low, r.high) == (pytest.approx(1.06738, abs=5e-6), pytest.approx(1.25609, abs=5e-6))
    assert r.p_value == pytest.approx(1.27e-4, abs=5e-7)
    pois = observed_expected(d2["y"], d2["p"], method="poisson")
    assert pois.low == pytest.approx(1.04245, abs=5e-6)
    assert pois.high == pytest.approx(1.28264, abs=5e-6)


def test_observed_expected_edges() -> None:
    r = observed_expected([0, 0, 0], [0.1, 0.2, 0.1])
    assert r.low == 0.0 and r.high > 0.0
    r = observed_expected([1, 1], [0.5, 0.5])
    assert r.low < r.ratio < r.high
    with pytest.raises(Undefined) as info:
        observed_expected([0, 1], [0.0, 0.0])
    assert info.value.reason == "zero_expected"


def test_undefined_cases() -> None:
    with pytest.raises(Undefined) as info:
        spiegelhalter_z([0, 1, 1], [0.5, 0.5, 0.5])
    assert info.value.reason == "zero_variance"
    with pytest.raises(Undefined) as info:
        hosmer_lemeshow([1, 0], [0.0, 0.0])
    assert info.value.reason == "zero_variance"
    with pytest.raises(ValueError, match="strategy"):
        expected_calibration_error([0, 1], [0.1, 0.2], strategy="other")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="n_bins"):
        expected_calibration_error([0, 1], [0.1, 0.2], n_bins=0)


def _null_pvalues(
    n_rep: int, n: int, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    hl_ext, hl_dev, sp, stat = (np.empty(n_rep) for _ in range(4))
    for r in range(n_rep):
        p = rng.beta(2.0, 5.0, n)
        y = (rng.random(n) < p).astype(np.int64)
        ext = hosmer_lemeshow(y, p)
        hl_ext[r] = ext.p_value
        stat[r] = ext.statistic
        hl_dev[r] = sps.chi2.sf(ext.statistic, ext.df - 2)
        sp[r] = spiegelhalter_z(y, p).p_value
    return hl_ext, hl_dev, sp, stat


def test_null_pvalues_uniform_and_g_minus_2_over_rejects() -> None:
    # Under a calibrated null on external data, HL with g df and Spiegelhalter give
    # uniform p-values; g − 2 df over-rejects (METHODS.md §3: 11.9 % at 5 %, D6).
    hl_ext, hl_dev, sp, stat = _null_pvalues(1500, 1000, 20240602)
    # METHODS.md §15 D6 (SIM): null mean about 10 on external data (±0.3).
    assert stat.mean() == pytest.approx(10.0, abs=0.3)
    assert sps.kstest(hl_ext, "uniform").pvalue > 0.01
    assert sps.kstest(sp, "uniform").pvalue > 0.01
    assert 0.035 < np.mean(hl_ext < 0.05) < 0.065
    assert 0.09 < np.mean(hl_dev < 0.05) < 0.15
