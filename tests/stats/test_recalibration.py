"""Recalibration maps and their cross-fitted gain (plumbwatch.stats.recalibration)."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy import special
from scipy.special import expit, logit

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.recalibration import (
    cross_fitted_gain,
    fit_beta,
    fit_isotonic,
    fit_platt,
    fit_recalibration,
    fit_temperature,
)


def _distorted(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    # The METHODS.md §10 check setting: truth sigma(-0.4 + 0.7 logit s), s ~ Beta(1.2, 3).
    rng = np.random.default_rng(seed)
    s = rng.beta(1.2, 3.0, n)
    y = (rng.random(n) < expit(-0.4 + 0.7 * logit(s))).astype(float)
    return y, s


def _verify_j_data() -> dict[str, np.ndarray]:
    """Replays the random stream of methods/checks/verify_j.py up to section K.

    Only the draws matter, not the statistics computed in between. numpy does not
    promise stable streams across versions; this matches numpy 2.4 (METHODS.md §15
    portability note), so the exact-value tests below are skipped if it drifts.
    """
    rng = np.random.default_rng(314)
    rng.beta(2, 5, 5000)  # J2: ref, same, shifted (beta draws are rejection-sampled,
    rng.beta(2, 5, 5000)  # so the shape parameters matter for the stream)
    rng.beta(2.6, 5, 5000)
    for _ in range(2000):  # J3
        rng.beta(2, 5, 2000)
        rng.beta(2, 5, 2000)
    rng.beta(2, 5, 3000)  # J4
    rng.beta(2, 5, 3000)
    for _ in range(1000):
        rng.beta(2, 5, 500)
        rng.beta(2, 5, 500)
    s = rng.beta(1.2, 3.0, 6000)
    y = (rng.random(6000) < expit(-0.4 + 0.7 * logit(s))).astype(float)
    z = rng.normal(size=(5000, 5)) * 2.0
    probs = special.softmax(z, axis=1)
    p_true = special.softmax(z / 1.8, axis=1)
    cls = (p_true.cumsum(1) > rng.random((5000, 1))).argmax(1)
    return {"s": s, "y": y, "probs": probs, "cls": cls}


@pytest.fixture(scope="module")
def k_data() -> dict[str, np.ndarray]:
    return _verify_j_data()


def test_k_temperature_estimate(k_data: dict[str, np.ndarray]) -> None:
    # METHODS.md §15 row K (SIM, scipy bounded minimisation): T = 1.7945 for true 1.8,
    # NLL 1.37155 -> 1.25030. Tolerance 1e-3 covers the optimiser's xatol (1e-5).
    tm = fit_temperature(k_data["cls"], k_data["probs"])
    assert tm.temperature == pytest.approx(1.7945, abs=1e-3)
    assert tm.nll_before == pytest.approx(1.37155, abs=1e-4)
    assert tm.nll_after == pytest.approx(1.25030, abs=1e-4)
    q = tm.apply(k_data["probs"])
    np.testing.assert_allclose(q.sum(axis=1), 1.0, rtol=1e-12)
    assert (q.argmax(1) == k_data["probs"].argmax(1)).all()


def test_k_in_sample_gains_match_methods_table(k_data: dict[str, np.ndarray]) -> None:
    # METHODS.md §10 table (HAND/SIM, statsmodels GLM and sklearn isotonic): in-sample
    # gains 0.01107 (Platt), 0.01109 (beta), 0.01544 (isotonic); 5e-5 = rounding of
    # the table's last digit.
    y, s = k_data["y"], k_data["s"]
    for method, expected in (("platt", 0.01107), ("beta", 0.01109), ("isotonic", 0.01544)):
        g = cross_fitted_gain(y, s, method, seed=0)
        assert g.in_sample == pytest.approx(expected, abs=5e-5), method
    # Isotonic is the optimistic one: cross-fitting removes a large share of its gain.
    iso = cross_fitted_gain(y, s, "isotonic", seed=0)
    assert iso.mean < iso.in_sample - 0.004
    platt = cross_fitted_gain(y, s, "platt", seed=0)
    assert platt.mean == pytest.approx(0.01083, abs=2 * platt.se)


def test_platt_recovers_known_distortion_and_matches_statsmodels() -> None:
    import statsmodels.api as sm

    y, s = _distorted(6000, seed=1)
    m = fit_platt(y, s)
    a, b = m.params
    # Truth (-0.4, 0.7); sampling SEs are about 0.05 and 0.03 at n = 6000: allow 4 SE.
    assert a == pytest.approx(-0.4, abs=0.2)
    assert b == pytest.approx(0.7, abs=0.12)
    glm = sm.GLM(y, sm.add_constant(logit(s)), family=sm.families.Binomial()).fit()
    np.testing.assert_allclose([a, b], glm.params, rtol=1e-8)
    np.testing.assert_allclose(m.apply(s), expit(a + b * logit(s)), rtol=1e-12)


def test_beta_fit_matches_statsmodels_and_repairs_sign() -> None:
    import statsmodels.api as sm

    y, s = _distorted(6000, seed=2)
    m = fit_beta(y, s)
    a, b, c = m.params
    x = np.column_stack([np.log(s), -np.log1p(-s)])
    glm = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial()).fit()
    np.testing.assert_allclose([c, a, b], glm.params, rtol=1e-7)
    assert a >= 0 and b >= 0
    # Outcomes that fall as ln p rises would need a < 0: the feature is dropped.
    rng = np.random.default_rng(3)
    p = rng.uniform(0.05, 0.95, 4000)
    y2 = (rng.random(4000) < expit(1.0 - 1.5 * np.log(p) + 0.0 * p)).astype(float)
    m2 = fit_beta(y2, p)
    assert m2.params[0] == 0.0 and m2.params[1] >= 0.0
    q = m2.apply(np.linspace(0.01, 0.99, 50))
    assert np.all(np.diff(q) >= -1e-15)


def test_isotonic_matches_sklearn() -> None:
    from sklearn.isotonic import IsotonicRegression

    y, s = _distorted(3000, seed=4)
    s = np.round(s, 3)  # ties, pooled before PAV by both
    m = fit_isotonic(y, s)
    ir = IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").fit(s, y)
    grid = np.linspace(0, 1, 2001)
    np.testing.assert_allclose(m.apply(grid), np.clip(ir.predict(grid), 1e-6, 1 - 1e-6), atol=1e-12)
    assert np.all(np.diff(m.apply(grid)) >= 0)
    # METHODS.md §15 row D5 (sklearn): PAV with ties.
    d5 = fit_isotonic([0, 1, 1, 0, 0, 1], [0.2, 0.2, 0.2, 0.5, 0.5, 0.8])
    np.testing.assert_allclose(d5.apply([0.2, 0.5, 0.8]), [0.4, 0.4, 1 - 1e-6], rtol=1e-12)


@pytest.mark.parametrize("method", ["platt", "beta", "isotonic"])
def test_knot_table_reproduces_apply(method: str) -> None:
    y, s = _distorted(4000, seed=5)
    m = fit_recalibration(y, s, method)
    table = np.array(m.knots())
    assert np.all(np.diff(table[:, 0]) > 0)
    p = expit(np.linspace(logit(1e-4), logit(1 - 1e-4), 20001))
    q_table = expit(np.interp(logit(p), logit(table[:, 0]), logit(table[:, 1])))
    assert np.max(np.abs(q_table - m.apply(p))) <= 1e-3
    assert len(table) < 5000
    back = type(m).from_dict(json.loads(json.dumps(m.to_dict())))
    np.testing.assert_array_equal(back.apply(p), m.apply(p))


def test_gain_near_zero_on_calibrated_data() -> None:
    rng = np.random.default_rng(6)
    s = rng.beta(1.2, 3.0, 5000)
    y = (rng.random(5000) < s).astype(float)
    for method in ("platt", "beta"):
        g = cross_fitted_gain(y, s, method, seed=1)
        assert g.low <= 0.0 <= g.high, (method, g)
        assert g.in_sample >= g.mean
    iso = cross_fitted_gain(y, s, "isotonic", seed=1)
    assert iso.mean < 0.002 and iso.in_sample > iso.mean


def test_errors_and_undefined() -> None:
    with pytest.raises(Undefined) as e:
        fit_platt([1, 1, 1], [0.2, 0.5, 0.7])
    assert e.value.reason == "one_class_only"
    with pytest.raises(ValueError, match="method"):
        fit_recalibration([0, 1], [0.2, 0.5], "spline")
    with pytest.raises(ValueError, match="y_prob"):
        fit_isotonic([0, 1], [0.2, 1.5])
    with pytest.raises(Undefined) as e2:
        cross_fitted_gain([0, 1, 0], [0.1, 0.5, 0.3], "platt")
    assert e2.value.reason == "too_few_rows"
    with pytest.raises(ValueError, match="y_true"):
        fit_temperature([0, 3], [[0.5, 0.5], [0.2, 0.8]])
    # Separated data: the logistic MLE does not exist.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(Undefined) as e3:
            fit_platt([0, 0, 1, 1], [0.1, 0.2, 0.8, 0.9])
    assert e3.value.reason == "no_mle"
