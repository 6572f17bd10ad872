"""Log loss, Brier and the Murphy decomposition."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss
from sklearn.metrics import log_loss as sk_log_loss

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.scores import (
    LOG_LOSS_EPS,
    brier_decomposition,
    brier_score,
    falsified_count,
    log_loss,
)

A1_Y = [0, 0, 1, 1, 0, 1, 1, 0]
A1_P = [0.1, 0.4, 0.35, 0.8, 0.4, 0.9, 0.4, 0.05]


def test_a1_log_loss_and_brier() -> None:
    # METHODS.md §15 A1 (REF: sklearn log_loss and brier_score_loss = hand).
    assert log_loss(A1_Y, A1_P) == pytest.approx(0.4341152476152784, rel=1e-12)
    assert log_loss(A1_Y, A1_P) / math.log(2) == pytest.approx(0.6262959149088466, rel=1e-12)
    assert brier_score(A1_Y, A1_P) == pytest.approx(0.145625, rel=1e-12)
    assert log_loss(A1_Y, A1_P) == pytest.approx(sk_log_loss(A1_Y, A1_P), rel=1e-12)
    assert brier_score(A1_Y, A1_P) == pytest.approx(brier_score_loss(A1_Y, A1_P), rel=1e-12)


def test_a2_clipping_at_float64_eps() -> None:
    # METHODS.md §15 A2: 24.260151319598084 with float64 eps (scikit-learn 1.9.1);
    # 23.257166522603836 with the old fixed 1e-15 (hand formula below).
    y, p = [1, 0, 1], [0.0, 1.0, 0.5]
    assert np.finfo(np.float64).eps == LOG_LOSS_EPS
    assert log_loss(y, p) == pytest.approx(24.260151319598084, rel=1e-12)
    assert log_loss(y, p) == pytest.approx(sk_log_loss(y, p), rel=1e-12)
    pc = np.clip(np.array(p), 1e-15, 1 - 1e-15)
    old = -np.mean(np.where(np.array(y) == 1, np.log(pc), np.log(1 - pc)))
    assert old == pytest.approx(23.257166522603836, rel=1e-12)
    assert falsified_count(y, p) == 2


def test_breast_cancer_against_sklearn(breast_cancer_probs) -> None:  # type: ignore[no-untyped-def]
    y, p = breast_cancer_probs
    w = np.linspace(0.5, 2.0, y.size)
    assert log_loss(y, p) == pytest.approx(sk_log_loss(y, p), rel=1e-12)
    assert log_loss(y, p, sample_weight=w) == pytest.approx(
        sk_log_loss(y, p, sample_weight=w), rel=1e-12
    )
    assert brier_score(y, p, sample_weight=w) == pytest.approx(
        brier_score_loss(y, p, sample_weight=w), rel=1e-12
    )


def test_b_murphy_exact_rationals() -> None:
    # METHODS.md §15 B: BS=81/350, REL=7/200, RES=13/392, UNC=45/196 (HAND, fractions).
    p = [0.2] * 5 + [0.6] * 5 + [0.9] * 4
    y = [0, 0, 0, 1, 1, 0, 1, 1, 1, 1, 1, 1, 1, 0]
    d = brier_decomposition(y, p, n_bins=None)
    for got, want in [
        (d.brier, Fraction(81, 350)),
        (d.reliability, Fraction(7, 200)),
        (d.resolution, Fraction(13, 392)),
        (d.uncertainty, Fraction(45, 196)),
    ]:
        assert got == pytest.approx(float(want), rel=1e-12)
    assert d.within_variance == pytest.approx(0.0, abs=1e-15)
    assert d.within_covariance == pytest.approx(0.0, abs=1e-15)
    assert d.reliability - d.resolution + d.uncertainty == pytest.approx(d.brier, rel=1e-12)
    assert d.brier == pytest.approx(brier_score_loss(y, p), rel=1e-12)


def test_binned_identity_with_stephenson_terms(simulate) -> None:  # type: ignore[no-untyped-def]
    # Stephenson, Coelho & Jolliffe (2008): BS = REL − RES + UNC + WBV − WBC.
    y, p = simulate(3000, 12, a=0.2, b=0.8)
    d = brier_decomposition(y, p, n_bins=10)
    total = d.reliability - d.resolution + d.uncertainty + d.within_variance
    assert total - d.within_covariance == pytest.approx(brier_score(y, p), rel=1e-12)
    assert d.brier == pytest.approx(brier_score(y, p), rel=1e-12)


def test_undefined_and_bad_input() -> None:
    with pytest.raises(Undefined) as info:
        log_loss([], [])
    assert info.value.reason == "no_rows"
    with pytest.raises(ValueError, match="y_prob"):
        brier_score([0, 1], [0.2, -0.1])
    with pytest.raises(ValueError, match="y_true"):
        log_loss([0, 0.5], [0.2, 0.1])
    with pytest.raises(ValueError, match="sample_weight"):
        log_loss([0, 1], [0.2, 0.1], sample_weight=[1.0, -1.0])
