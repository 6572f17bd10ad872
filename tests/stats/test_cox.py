"""Cox intercept/slope, calibration-in-the-large and the LR test, raw and on sketches."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.cox import (
    calibration_in_the_large,
    calibration_in_the_large_from_sketch,
    cox_calibration,
    cox_calibration_from_sketch,
    recalibration_lr_test,
    recalibration_lr_test_from_sketch,
)
from plumbwatch.stats.grid import clipped_logit
from plumbwatch.stats.sketch import Sketch


def test_d2_cox_values(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §15 D2 (REF: statsmodels GLM): a, b and SEs.
    r = cox_calibration(d2["y"], d2["p"])
    assert r.intercept == pytest.approx(0.250205008405216, rel=1e-9)
    assert r.slope == pytest.approx(0.9538438391741593, rel=1e-9)
    assert r.intercept_se == pytest.approx(0.0921713, abs=5e-8)
    assert r.slope_se == pytest.approx(0.0756397, abs=5e-8)
    assert r.slope_ci[0] < r.slope < r.slope_ci[1]
    ref = sm.GLM(
        d2["y"], sm.add_constant(clipped_logit(d2["p"])), family=sm.families.Binomial()
    ).fit()
    np.testing.assert_allclose(ref.conf_int()[1], r.slope_ci, rtol=1e-7)


def test_d2_citl_and_lr(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §15 D2: CITL a0 0.2839362163720585 (SE 0.0742220), statsmodels offset GLM;
    # LR test 14.724314734073005, p 0.000634827.
    c = calibration_in_the_large(d2["y"], d2["p"])
    assert c.intercept == pytest.approx(0.2839362163720585, rel=1e-9)
    assert c.se == pytest.approx(0.0742220, abs=5e-8)
    z = clipped_logit(d2["p"])
    ref = sm.GLM(d2["y"], np.ones(z.size), family=sm.families.Binomial(), offset=z).fit()
    assert c.intercept == pytest.approx(ref.params[0], rel=1e-9)
    lr = recalibration_lr_test(d2["y"], d2["p"])
    assert lr.statistic == pytest.approx(14.724314734073005, rel=1e-8)
    assert lr.p_value == pytest.approx(0.000634827, abs=5e-10)
    assert lr.df == 2


def test_breast_cancer_against_statsmodels(breast_cancer_probs) -> None:  # type: ignore[no-untyped-def]
    y, p = breast_cancer_probs
    X = sm.add_constant(clipped_logit(p))
    # statsmodels' default IRLS tolerance leaves SEs ~1e-5 off on these extreme
    # probabilities; tighten it so both sit at the optimum.
    ref = sm.GLM(y, X, family=sm.families.Binomial()).fit(tol=1e-14, maxiter=200)
    r = cox_calibration(y, p)
    np.testing.assert_allclose([r.intercept, r.slope], ref.params, rtol=1e-8)
    np.testing.assert_allclose([r.intercept_se, r.slope_se], ref.bse, rtol=1e-6)


@pytest.mark.parametrize(("a", "b"), [(0.0, 1.0), (0.3, 0.8), (-0.4, 1.3)])
def test_sketch_fits_within_derived_bound(simulate, a: float, b: float) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(50_000, 30, a=a, b=b)
    s = Sketch.from_arrays(y, p)
    raw, grid_fit = cox_calibration(y, p), cox_calibration_from_sketch(s)
    assert abs(grid_fit.intercept - raw.intercept) <= grid_fit.bound[0]
    assert abs(grid_fit.slope - raw.slope) <= grid_fit.bound[1]
    # The bound is small next to the sampling error.
    assert max(grid_fit.bound) < 0.05 * min(raw.intercept_se, raw.slope_se) * 10
    assert abs(grid_fit.slope - raw.slope) < 1e-3
    c_raw, c_grid = calibration_in_the_large(y, p), calibration_in_the_large_from_sketch(s)
    assert abs(c_grid.intercept - c_raw.intercept) <= c_grid.bound
    assert abs(c_grid.intercept - c_raw.intercept) < 1e-4
    lr_raw, lr_grid = recalibration_lr_test(y, p), recalibration_lr_test_from_sketch(s)
    assert abs(lr_grid.statistic - lr_raw.statistic) <= lr_grid.bound


def test_undefined() -> None:
    with pytest.raises(Undefined) as info:
        cox_calibration([1, 1, 1], [0.2, 0.4, 0.6])
    assert info.value.reason == "one_class_only"
    with pytest.raises(Undefined) as info:
        cox_calibration_from_sketch(Sketch.from_arrays([0, 0], [0.2, 0.4]))
    assert info.value.reason == "one_class_only"
    with pytest.raises(Undefined) as info:
        cox_calibration([0, 0, 1, 1], [0.1, 0.2, 0.8, 0.9])
    assert info.value.reason == "no_mle"
