"""Mixture e-processes and risk-adjusted CUSUM (plumbwatch.stats.evidence)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import expit, logit, logsumexp

from plumbwatch.stats.evidence import (
    MixtureEvidence,
    RiskAdjustedCusum,
    TemperatureEvidence,
    binary_log_lr,
    binary_log_lr_sums,
    cusum_threshold_by_simulation,
    cusum_weights,
    log_evidence_path,
    log_threshold,
)

H3_P = [0.2, 0.7, 0.5, 0.9, 0.1]
H3_Y = [1, 0, 1, 1, 0]
# METHODS.md §15 row H3 (hand, verify_h.py).
H3_PATH = [
    0.03890646609998827,
    0.04215707252190981,
    0.047469709677232075,
    0.003962479401872887,
    -0.05640443496443348,
]


def test_h3_path_matches_methods_check_values() -> None:
    state, path = MixtureEvidence.start().update_with_path(H3_Y, H3_P)
    np.testing.assert_allclose(path, H3_PATH, rtol=1e-12, atol=0)
    assert state.log_evidence == pytest.approx(H3_PATH[-1], rel=1e-12)
    assert state.n == 5
    assert state.max_log_evidence == pytest.approx(max(H3_PATH), rel=1e-12)
    assert state.p_value == pytest.approx(math.exp(-max(H3_PATH)), rel=1e-12)
    np.testing.assert_allclose(log_evidence_path(H3_Y, H3_P), H3_PATH, rtol=1e-12)


def test_h3_single_alternative() -> None:
    # METHODS.md §15 row H3, single alternative a = 0.5, b = 1.
    s = MixtureEvidence.start([0.5], [1.0]).update(H3_Y, H3_P)
    assert s.log_evidence == pytest.approx(0.19997562323137383, rel=1e-12)
    lr = binary_log_lr(np.array(H3_Y, float), np.array(H3_P), [0.5], [1.0])
    assert lr.sum() == pytest.approx(0.19997562323137383, rel=1e-12)


def test_fresh_state_and_null_only_grid() -> None:
    s = MixtureEvidence.start()
    assert s.log_evidence == pytest.approx(0.0, abs=1e-15)
    assert s.p_value == 1.0 and not s.crossed(0.05)
    # The null alternative alone never moves.
    rng = np.random.default_rng(0)
    p = rng.random(100)
    s0 = MixtureEvidence.start([0.0], [1.0]).update((rng.random(100) < p).astype(int), p)
    assert s0.log_evidence == pytest.approx(0.0, abs=1e-12)


def test_weights_are_normalised() -> None:
    a = MixtureEvidence.start([0.0, 0.5], [1.0], weights=[1.0, 3.0])
    b = MixtureEvidence.start([0.0, 0.5], [1.0], weights=[0.25, 0.75])
    np.testing.assert_allclose(a.log_weights, b.log_weights, rtol=1e-15)
    assert logsumexp(a.log_weights) == pytest.approx(0.0, abs=1e-15)


def test_p_zero_or_one_is_clipped_not_infinite() -> None:
    s = MixtureEvidence.start().update([1, 0], [0.0, 1.0])
    assert math.isfinite(s.log_evidence) and s.log_evidence > 5


def test_bad_input_raises_value_error_naming_parameter() -> None:
    s = MixtureEvidence.start()
    with pytest.raises(ValueError, match="y_prob"):
        s.update([1, 0], [0.5, 1.5])
    with pytest.raises(ValueError, match="y_true"):
        s.update([2, 0], [0.5, 0.5])
    with pytest.raises(ValueError, match="same length"):
        s.update([1, 0, 1], [0.5, 0.5])
    with pytest.raises(ValueError, match="y_prob"):
        s.update([1], [float("nan")])
    with pytest.raises(ValueError, match="alpha"):
        s.crossed(1.5)
    with pytest.raises(ValueError, match="weights"):
        MixtureEvidence.start(weights=[1.0])


def test_log_threshold() -> None:
    assert log_threshold(alpha=0.05) == pytest.approx(math.log(20), rel=1e-15)
    assert log_threshold(alpha=0.05, n_slices=12) == pytest.approx(math.log(240), rel=1e-15)
    with pytest.raises(ValueError, match="n_slices"):
        log_threshold(alpha=0.05, n_slices=0)


def test_empty_batch_is_a_no_op() -> None:
    s = MixtureEvidence.start().update(H3_Y, H3_P)
    assert s.update([], []) == s


def test_chunked_large_batch_equals_row_by_row_sums() -> None:
    rng = np.random.default_rng(1)
    n = 70_000  # more than one internal chunk
    p = rng.beta(2, 5, n)
    y = (rng.random(n) < p).astype(float)
    s, path = MixtureEvidence.start().update_with_path(y, p)
    direct = binary_log_lr(y, p, s.params[:, 0], s.params[:, 1]).sum(axis=0)
    np.testing.assert_allclose(s.log_lr, direct, rtol=1e-9, atol=1e-9)
    assert path[-1] == pytest.approx(s.log_evidence, rel=1e-12)
    assert s.max_log_evidence == pytest.approx(max(0.0, path.max()), rel=1e-12)


@pytest.mark.parametrize("wide", [False, True], ids=["default-grid", "wide-grid"])
def test_log_lr_sums_per_group_equal_row_sums(wide: bool) -> None:
    # The grouped fast form against binary_log_lr summed row by row with numpy;
    # p = 0 and 1 exercise the clipping, a wide grid the fallback to the direct form.
    rng = np.random.default_rng(7)
    n, k = 20_000, 37
    p = np.r_[rng.beta(2, 5, n - 2), 0.0, 1.0]
    y = (rng.random(n) < p).astype(np.int64)
    groups = rng.integers(0, k, n)
    groups[groups == 5] = 6  # a group without rows sums to zero
    s = MixtureEvidence.start()
    a, b = s.params[:, 0], s.params[:, 1]
    if wide:
        a, b = a * 40.0, b * 40.0
    got = binary_log_lr_sums(y, p, groups, k, a, b)
    rows = binary_log_lr(y, p, a, b)
    want = np.stack([rows[groups == g].sum(axis=0) for g in range(k)])
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-8)
    assert not got[5].any()


batches = st.lists(
    st.tuples(st.integers(0, 1), st.floats(0.0, 1.0, allow_nan=False)), min_size=0, max_size=40
)


@settings(max_examples=60, deadline=None)
@given(rows=batches, cut=st.integers(0, 40))
def test_one_batch_equals_two_batches(rows: list[tuple[int, float]], cut: int) -> None:
    y = np.array([r[0] for r in rows], dtype=float)
    p = np.array([r[1] for r in rows], dtype=float)
    cut = min(cut, len(rows))
    whole, path = MixtureEvidence.start().update_with_path(y, p)
    first, path1 = MixtureEvidence.start().update_with_path(y[:cut], p[:cut])
    both, path2 = first.update_with_path(y[cut:], p[cut:])
    assert both.n == whole.n
    np.testing.assert_allclose(both.log_lr, whole.log_lr, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(np.concatenate([path1, path2]), path, rtol=1e-10, atol=1e-12)
    assert both.max_log_evidence == pytest.approx(whole.max_log_evidence, rel=1e-10, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(rows=batches)
def test_serialisation_round_trip(rows: list[tuple[int, float]]) -> None:
    y = np.array([r[0] for r in rows], dtype=float)
    p = np.array([r[1] for r in rows], dtype=float)
    s = MixtureEvidence.start().update(y, p)
    assert MixtureEvidence.from_bytes(s.to_bytes()) == s
    assert MixtureEvidence.from_dict(json.loads(json.dumps(s.to_dict()))) == s
    t = TemperatureEvidence.start()
    assert TemperatureEvidence.from_bytes(t.to_bytes()) == t


def test_serialisation_is_compact_and_checked() -> None:
    s = MixtureEvidence.start().update(H3_Y, H3_P)
    data = s.to_bytes()
    assert len(data) == 32 + 8 * 25 * 4  # header + params (2 per alt) + weights + sums
    with pytest.raises(ValueError, match="data"):
        TemperatureEvidence.from_bytes(data)
    with pytest.raises(ValueError, match="data"):
        MixtureEvidence.from_bytes(b"XXXX" + data[4:])
    with pytest.raises(ValueError, match="data"):
        MixtureEvidence.from_bytes(data[:-8])


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 30), cut=st.integers(0, 30))
def test_temperature_one_batch_equals_two(seed: int, n: int, cut: int) -> None:
    rng = np.random.default_rng(seed)
    probs = rng.dirichlet(np.ones(4), size=n)
    y = rng.integers(0, 4, size=n)
    cut = min(cut, n)
    whole = TemperatureEvidence.start().update(y, probs)
    both = TemperatureEvidence.start().update(y[:cut], probs[:cut]).update(y[cut:], probs[cut:])
    np.testing.assert_allclose(both.log_lr, whole.log_lr, rtol=1e-10, atol=1e-12)
    assert both.n == whole.n == n
    assert TemperatureEvidence.from_dict(json.loads(json.dumps(both.to_dict()))) == both


def test_temperature_evidence_matches_hand_computation() -> None:
    rng = np.random.default_rng(2)
    probs = rng.dirichlet(np.ones(3), size=50)
    y = rng.integers(0, 3, size=50)
    s = TemperatureEvidence.start([0.7, 1.0, 1.5])
    s2 = s.update(y, probs)
    hand = []
    for t in (0.7, 1.0, 1.5):
        q = probs ** (1 / t)
        q /= q.sum(axis=1, keepdims=True)
        hand.append(np.sum(np.log(q[np.arange(50), y]) - np.log(probs[np.arange(50), y])))
    np.testing.assert_allclose(s2.log_lr, hand, rtol=1e-9, atol=1e-12)
    assert s2.log_lr[1] == pytest.approx(0.0, abs=1e-12)
    with pytest.raises(ValueError, match="y_true"):
        s.update([3], probs[:1])
    with pytest.raises(ValueError, match="y_prob"):
        s.update([0], probs[0])


def _stream_max_log_e(p: np.ndarray, y: np.ndarray, state: MixtureEvidence) -> np.ndarray:
    """Running max of log E for many streams at once: p, y have shape (streams, T)."""
    n_streams, t_len = p.shape
    a, b = state.params[:, 0], state.params[:, 1]
    acc = np.zeros((n_streams, a.size))
    best = np.full(n_streams, -np.inf)
    for t0 in range(0, t_len, 100):
        sl = slice(t0, min(t_len, t0 + 100))
        c = p[:, sl].shape[1]
        lr = binary_log_lr(y[:, sl].ravel(), p[:, sl].ravel(), a, b).reshape(n_streams, c, -1)
        cum = acc[:, None, :] + np.cumsum(lr, axis=1)
        acc = cum[:, -1, :]
        best = np.maximum(best, logsumexp(cum + state.log_weights, axis=2).max(axis=1))
    return best


def test_null_crossing_rate_within_alpha_over_2000_streams() -> None:
    # METHODS.md §7.6 / §15 H1: T = 2000 per path, p ~ Beta(2, 5), alpha = 0.05.
    # Ville gives <= alpha; allow three binomial standard errors of Monte Carlo noise.
    rng = np.random.default_rng(20240601)
    n_streams, t_len, alpha = 2000, 1500, 0.05
    p = rng.beta(2, 5, (n_streams, t_len))
    y = (rng.random((n_streams, t_len)) < p).astype(float)
    best = _stream_max_log_e(p, y, MixtureEvidence.start())
    rate = float(np.mean(best >= math.log(1 / alpha)))
    assert rate <= alpha + 3 * math.sqrt(alpha * (1 - alpha) / n_streams)


def test_detects_intercept_shift_of_0_3_logits() -> None:
    # Truth sigma(logit p + 0.3): the model under-predicts. Every stream should
    # cross 1/alpha within 4000 rows (detection figures are reported in the hand-off).
    rng = np.random.default_rng(7)
    n_streams, t_len, alpha = 200, 4000, 0.05
    p = rng.beta(2, 5, (n_streams, t_len))
    y = (rng.random((n_streams, t_len)) < expit(logit(p) + 0.3)).astype(float)
    state = MixtureEvidence.start()
    thr = math.log(1 / alpha)
    rows, events = [], []
    for i in range(n_streams):
        _, path = state.update_with_path(y[i], p[i])
        hit = np.flatnonzero(path >= thr)
        if hit.size:
            rows.append(hit[0] + 1)
            events.append(int(y[i, : hit[0] + 1].sum()))
    assert len(rows) / n_streams >= 0.95
    assert 200 < np.median(rows) < 2000
    assert np.median(events) < 600


def test_maturity_order_not_inflated_arrival_order_is() -> None:
    # METHODS.md §7.5 / §15 H4: positives revealed at their event time, negatives only
    # at the horizon. Arrival order crosses 1/alpha on most null paths; maturity order
    # stays within alpha (plus Monte Carlo margin).
    rng = np.random.default_rng(11)
    n_streams, n, horizon, alpha = 300, 1500, 30.0, 0.05
    s = np.sort(rng.uniform(0, 300, (n_streams, n)), axis=1)
    p = rng.beta(2, 5, (n_streams, n))
    y = (rng.random((n_streams, n)) < p).astype(float)
    arrival = np.where(y == 1, s + rng.uniform(0, horizon, (n_streams, n)), s + horizon)
    o_arr = np.argsort(arrival, axis=1, kind="mergesort")
    o_mat = np.argsort(s + horizon, axis=1, kind="mergesort")
    state = MixtureEvidence.start()
    thr = math.log(1 / alpha)
    take = np.take_along_axis
    arr = _stream_max_log_e(take(p, o_arr, 1), take(y, o_arr, 1), state) >= thr
    mat = _stream_max_log_e(take(p, o_mat, 1), take(y, o_mat, 1), state) >= thr
    assert arr.mean() > 0.8
    assert mat.mean() <= alpha + 3 * math.sqrt(alpha * (1 - alpha) / n_streams)


# ---------------------------------------------------------------- CUSUM


def test_h7_cusum_weights() -> None:
    # METHODS.md §15 row H7: p = 0.2, R_A = 2.
    w = cusum_weights(np.array([1.0, 0.0]), np.array([0.2, 0.2]), [2.0])
    assert w[0, 0] == pytest.approx(0.5108256237659905, rel=1e-12)
    assert w[1, 0] == pytest.approx(-0.1823215567939548, rel=1e-12)
    # The weight is the log LR of an odds shift by R_A (METHODS.md §8).
    q = expit(logit(0.2) + math.log(2.0))
    assert w[0, 0] == pytest.approx(math.log(q / 0.2), rel=1e-12)


def test_cusum_vectorised_recursion_equals_loop() -> None:
    rng = np.random.default_rng(3)
    p = rng.beta(2, 5, 3000)
    y = (rng.random(3000) < expit(logit(p) + 0.4)).astype(float)
    c = RiskAdjustedCusum.start()
    half, path1 = c.update_with_path(y[:1234], p[:1234])
    final, path2 = half.update_with_path(y[1234:], p[1234:])
    path = np.vstack([path1, path2])
    w = cusum_weights(y, p, c.r_a)
    loop = np.zeros_like(w)
    cur = np.zeros(w.shape[1])
    for t in range(w.shape[0]):
        cur = np.maximum(0.0, cur + w[t])
        loop[t] = cur
    np.testing.assert_allclose(path, loop, rtol=1e-9, atol=1e-9)
    assert final.n == 3000
    np.testing.assert_allclose(final.max_statistic, loop.max(axis=0), rtol=1e-9)
    assert final.signalled(1.0) == tuple(bool(v) for v in loop.max(axis=0) >= 1.0)
    assert RiskAdjustedCusum.from_dict(json.loads(json.dumps(final.to_dict()))) == final


def test_cusum_rejects_bad_odds_ratio() -> None:
    with pytest.raises(ValueError, match="r_a"):
        RiskAdjustedCusum.start([1.0])
    with pytest.raises(ValueError, match="r_a"):
        cusum_threshold_by_simulation([0.2], target_arl0=100, r_a=-1.0)
    with pytest.raises(ValueError, match="target_arl0"):
        cusum_threshold_by_simulation([0.2], target_arl0=0.5)


def test_cusum_threshold_by_simulation() -> None:
    rng = np.random.default_rng(5)
    pool = rng.beta(2, 5, 5000)
    res = cusum_threshold_by_simulation(pool, target_arl0=2750, r_a=2.0, n_sims=400, seed=1)
    # ARL0 >= e^h (METHODS.md §8) puts h below ln(target); the simulated ARL0 at h meets it.
    assert 0 < res.h <= math.log(2750)
    assert res.arl0 >= 2750 and res.censored == 0
    # METHODS.md §8 table: h = ln 100 gives ARL0 ~ 2,700-2,800 for p ~ Beta(2, 5), R_A = 2.
    assert res.h == pytest.approx(math.log(100), abs=0.25)
    # An independent check of the returned h: fresh runs, plain loop over rows.
    n_sims, cap = 200, 40_000
    r2 = np.random.default_rng(99)
    w = np.zeros(n_sims)
    alive = np.ones(n_sims, bool)
    lengths = np.full(n_sims, cap)
    for t in range(1, cap + 1):
        p = pool[r2.integers(0, pool.size, n_sims)]
        yy = r2.random(n_sims) < p
        w = np.maximum(0.0, w + np.where(yy, math.log(2.0), 0.0) - np.log(1 - p + 2 * p))
        hit = alive & (w >= res.h)
        lengths[hit] = t
        alive &= ~hit
        if not alive.any():
            break
    se = lengths.std(ddof=1) / math.sqrt(n_sims)
    assert abs(lengths.mean() - res.arl0) < 4 * math.hypot(se, res.arl0_se)


def test_cusum_fed_weights_in_chunks_equals_the_whole_path() -> None:
    # update_with_weights walks more than one internal chunk and keeps no path; the
    # reference is the whole path of update_with_path (W_t = max(0, W_{t-1} + w_t)).
    rng = np.random.default_rng(11)
    n = 150_000
    p = rng.beta(2, 5, n)
    y = (rng.random(n) < np.clip(p * 1.3, 0, 1)).astype(float)
    start = RiskAdjustedCusum.start().update([1, 1, 0], [0.1, 0.2, 0.3])
    whole, path = start.update_with_path(y, p)
    fed = start.update_with_weights(cusum_weights(y, p, start.r_a))
    assert fed.n == whole.n == start.n + n
    np.testing.assert_allclose(fed.statistic, path[-1], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(fed.max_statistic, whole.max_statistic, rtol=1e-9, atol=1e-9)
    assert start.update_with_weights(np.empty((0, 2))) == start
    with pytest.raises(ValueError, match="weights"):
        start.update_with_weights(np.zeros((3, 3)))
