"""BH, BY and e-BH (plumbwatch.stats.multiple)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multitest import multipletests

from plumbwatch.stats.multiple import benjamini_hochberg, benjamini_yekutieli, e_bh


def test_h6_e_bh_rejects_first_two() -> None:
    # METHODS.md §15 row H6 (hand): e = (50, 30, 8, 2, 1, .5), alpha = .1.
    res = e_bh([50, 30, 8, 2, 1, 0.5], alpha=0.1)
    assert res.rejected.tolist() == [True, True, False, False, False, False]
    assert res.n_rejected == 2
    # Smallest rejecting level: min over j >= i of m / (j e_(j)), e in decreasing order.
    np.testing.assert_allclose(res.adjusted[:3], [6 / 60, 6 / 60, 6 / 24], rtol=1e-12)


def test_h6_bh_adjusted_values() -> None:
    # METHODS.md §15 row H6, statsmodels multipletests('fdr_bh').
    p = [0.001, 0.008, 0.039, 0.041, 0.042, 0.060, 0.074, 0.205]
    res = benjamini_hochberg(p, alpha=0.05)
    assert res.rejected.tolist() == [True, True] + [False] * 6
    expected = [0.008, 0.032, 0.0672, 0.0672, 0.0672, 0.08, 0.084571428571428575, 0.205]
    np.testing.assert_allclose(res.adjusted, expected, rtol=1e-12)


@pytest.mark.parametrize("seed", range(20))
def test_matches_statsmodels_on_random_p_values(seed: int) -> None:
    rng = np.random.default_rng(seed)
    m = int(rng.integers(1, 60))
    # A mix of nulls, signals and exact ties, so ties and the cap at 1 are exercised.
    p = np.concatenate([rng.random(m), rng.beta(0.2, 5, m)])
    p[: m // 4] = np.round(p[: m // 4], 2)
    rng.shuffle(p)
    for ours, method in ((benjamini_hochberg, "fdr_bh"), (benjamini_yekutieli, "fdr_by")):
        for alpha in (0.01, 0.1):
            rej, adj, _, _ = multipletests(p, alpha=alpha, method=method)
            res = ours(p, alpha=alpha)
            np.testing.assert_allclose(res.adjusted, adj, rtol=1e-12, atol=1e-15)
            assert res.rejected.tolist() == rej.tolist()


def test_e_bh_equals_bh_on_reciprocals() -> None:
    rng = np.random.default_rng(4)
    e = np.exp(rng.normal(0, 3, 50))
    res = e_bh(e, alpha=0.1)
    bh = benjamini_hochberg(np.minimum(1.0, 1.0 / e), alpha=0.1)
    np.testing.assert_allclose(res.adjusted, bh.adjusted, rtol=1e-12)
    assert res.rejected.tolist() == bh.rejected.tolist()


def test_edge_cases_and_errors() -> None:
    assert benjamini_hochberg([], alpha=0.1).n_rejected == 0
    assert e_bh([], alpha=0.1).n_rejected == 0
    assert e_bh([0.0, np.inf], alpha=0.1).rejected.tolist() == [False, True]
    with pytest.raises(ValueError, match="p_values"):
        benjamini_hochberg([0.5, 1.2])
    with pytest.raises(ValueError, match="p_values"):
        benjamini_yekutieli([float("nan")])
    with pytest.raises(ValueError, match="e_values"):
        e_bh([-1.0])
    with pytest.raises(ValueError, match="alpha"):
        e_bh([1.0], alpha=0.0)


values = st.lists(st.floats(0.0, 1.0, allow_nan=False), min_size=1, max_size=30)


@settings(max_examples=80, deadline=None)
@given(p=values, data=st.data())
def test_invariant_to_permutation(p: list[float], data: st.DataObject) -> None:
    perm = np.array(data.draw(st.permutations(range(len(p)))))
    arr = np.array(p)
    e = 1.0 / np.maximum(arr, 1e-9)
    for proc, x in ((benjamini_hochberg, arr), (benjamini_yekutieli, arr), (e_bh, e)):
        a = proc(x, alpha=0.1)
        b = proc(x[perm], alpha=0.1)
        assert b.rejected.tolist() == a.rejected[perm].tolist()
        np.testing.assert_allclose(b.adjusted, a.adjusted[perm], rtol=1e-12)


def _fdr(rejected: np.ndarray, is_null: np.ndarray) -> float:
    r = rejected.sum(axis=1)
    v = (rejected & is_null).sum(axis=1)
    return float(np.mean(np.where(r > 0, v / np.maximum(r, 1), 0.0)))


def test_fdr_held_in_simulation() -> None:
    # 2,000 runs of m = 50 independent tests, 40 null. Nulls: p ~ U(0, 1) and e = the
    # likelihood ratio of N(3, 1) against N(0, 1) at a N(0, 1) draw (E = 1 exactly).
    # Signals: statistic ~ N(3, 1). Bound: alpha m0/m (BH) and alpha (e-BH), plus
    # three Monte-Carlo standard errors of a mean of values in [0, 1].
    rng = np.random.default_rng(2024)
    runs, m, m0, alpha, mu = 2000, 50, 40, 0.1, 3.0
    is_null = np.zeros((runs, m), bool)
    is_null[:, :m0] = True
    x = rng.normal(0, 1, (runs, m)) + np.where(is_null, 0.0, mu)
    from scipy.stats import norm

    p = norm.sf(x)
    e = np.exp(mu * x - mu**2 / 2)
    bh = np.array([benjamini_hochberg(row, alpha=alpha).rejected for row in p])
    eb = np.array([e_bh(row, alpha=alpha).rejected for row in e])
    margin = 3 * 0.5 / math.sqrt(runs)
    fdr_bh, fdr_eb = _fdr(bh, is_null), _fdr(eb, is_null)
    assert fdr_bh <= alpha * m0 / m + margin
    assert fdr_eb <= alpha + margin
    # Both have power here; e-BH is the more conservative.
    assert bh.sum(axis=1).mean() > eb.sum(axis=1).mean() > 1
