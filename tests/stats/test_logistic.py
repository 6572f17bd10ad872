"""The generic logistic fitter against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.grid import clipped_logit
from plumbwatch.stats.logistic import fit_logistic


def test_matches_statsmodels_glm_on_d2(d2) -> None:  # type: ignore[no-untyped-def]
    # Source: statsmodels GLM(Binomial) on METHODS.md D2; values in METHODS.md §15.
    z = clipped_logit(d2["p"])
    X = sm.add_constant(z)
    fit = fit_logistic(X, d2["y"])
    ref = sm.GLM(d2["y"], X, family=sm.families.Binomial()).fit()
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-9)
    np.testing.assert_allclose(fit.se, ref.bse, rtol=1e-7)
    assert fit.loglik == pytest.approx(ref.llf, rel=1e-12)
    np.testing.assert_allclose(fit.coef, [0.250205008405216, 0.9538438391741593], rtol=1e-9)


def test_offset_and_fractional_weighted_outcomes(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(4000, 11, a=0.2)
    z = clipped_logit(p)
    # Grouping identical rows into (fraction, weight) pairs must give the same fit.
    zr = np.round(z, 1)
    keys, inv = np.unique(zr, return_inverse=True)
    cnt = np.bincount(inv)
    frac = np.bincount(inv, weights=y) / cnt
    full = fit_logistic(np.ones((y.size, 1)), y, offset=zr)
    grouped = fit_logistic(np.ones((keys.size, 1)), frac, sample_weight=cnt, offset=keys)
    np.testing.assert_allclose(grouped.coef, full.coef, rtol=1e-9)
    np.testing.assert_allclose(grouped.cov, full.cov, rtol=1e-7)
    ref = sm.GLM(y, np.ones(y.size), family=sm.families.Binomial(), offset=zr).fit()
    np.testing.assert_allclose(full.coef, ref.params, rtol=1e-9)


@pytest.mark.parametrize(
    ("x", "y"),
    [
        ([0.0, 1.0, 2.0, 3.0], [0, 0, 1, 1]),
        ([0.0, 1.0, 2.0, 3.0], [1, 1, 1, 1]),
        ([1.0, 1.0, 1.0, 1.0], [0, 1, 0, 1]),
    ],
)
def test_no_mle(x: list[float], y: list[int]) -> None:
    X = np.column_stack([np.ones(4), x])
    with pytest.raises(Undefined) as info:
        fit_logistic(X, y)
    assert info.value.reason == "no_mle"


def test_bad_input() -> None:
    with pytest.raises(ValueError, match="y"):
        fit_logistic(np.ones((2, 1)), [0.0, 1.5])
    with pytest.raises(ValueError, match="X"):
        fit_logistic(np.ones(2), [0.0, 1.0])
    with pytest.raises(ValueError, match="offset"):
        fit_logistic(np.ones((2, 1)), [0.0, 1.0], offset=[0.0])
