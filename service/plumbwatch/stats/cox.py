"""Logistic recalibration: Cox intercept and slope, calibration-in-the-large, LR test.

Model ``logit P(Y=1) = a + b·z`` with ``z = logit(clip(p, 1e-6, 1-1e-6))``
(METHODS.md §5.1). Calibration-in-the-large (CITL) is the separate fit with
``b`` fixed at 1 (``z`` as offset), following Van Calster et al. (2016); the
joint fit's ``a`` is *not* CITL.

On a sketch
-----------
Each grid bin becomes two weighted pseudo-rows, one per outcome class, at the
class's mean ``z`` in the bin (``sum_y_logit / sum_y`` and the complement).
The ``Σ y·η`` part of the likelihood and of the score is then exact; only
``Σ σ(η_i)`` is replaced by ``Σ σ(η̄)``. Because ``η̄`` is the class-bin mean,
the first-order term of the Taylor expansion cancels, and with
``|σ''| ≤ 1/(6√3)`` the score error per row is at most ``b²δ²/(12√3)`` for the
intercept equation and ``(|b|/4 + b²|z|/(12√3))·δ²`` for the slope equation,
where ``δ`` is the bin's width in z (≤ 0.02 on the grid; 0 in the two outer
bins, where clipping makes z constant). To first order the coefficients move
by at most ``|cov| · e`` for the summed score-error bound ``e``; this is
returned as ``bound``. Log-likelihoods move by at most ``Σ n_b (bδ_b)²/8``
(``softplus'' ≤ 1/4``), which bounds the LR statistic's error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from plumbwatch.stats import grid
from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair, check_level
from plumbwatch.stats.logistic import LogisticFit, fit_logistic
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]
_C2 = 1.0 / (12.0 * np.sqrt(3.0))  # half the maximum of |sigma''|

_Z_LOW = grid.clipped_logit(grid.BIN_LOW)
_Z_HIGH = grid.clipped_logit(grid.BIN_HIGH)
_Z_WIDTH = _Z_HIGH - _Z_LOW
_Z_ABS = np.maximum(np.abs(_Z_LOW), np.abs(_Z_HIGH))


@dataclass(frozen=True)
class CoxCalibration:
    """Joint fit ``logit P = a + b z``; ``bound`` is (0, 0) on raw data."""

    intercept: float
    slope: float
    intercept_se: float
    slope_se: float
    intercept_ci: tuple[float, float]
    slope_ci: tuple[float, float]
    loglik: float
    bound: tuple[float, float] = (0.0, 0.0)


@dataclass(frozen=True)
class CalibrationInTheLarge:
    """Offset fit ``logit P = a0 + z``; ``a0 > 0``: the model under-predicts."""

    intercept: float
    se: float
    ci: tuple[float, float]
    bound: float = 0.0


@dataclass(frozen=True)
class RecalibrationTest:
    """Likelihood-ratio test of a = 0, b = 1 (2 df)."""

    statistic: float
    df: int
    p_value: float
    bound: float = 0.0


@dataclass(frozen=True)
class _Design:
    z: FloatArray
    y: FloatArray
    w: FloatArray | None
    dz2: FloatArray  # squared within-bin spread of z per row (0 for raw rows)
    zabs: FloatArray


def _raw_design(y_true: ArrayLike, y_prob: ArrayLike, sample_weight: ArrayLike | None) -> _Design:
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = np.ones(y.size) if w is None else w
    events, total = float(np.dot(ww, y)), float(ww.sum())
    if events <= 0.0 or events >= total:
        raise Undefined("one_class_only", "all outcomes are equal; the fit has no MLE")
    z = grid.clipped_logit(p)
    return _Design(z, y, w, np.zeros(y.size), np.abs(z))


def _sketch_design(sketch: Sketch) -> _Design:
    pos = sketch.sum_y
    neg = sketch.count - sketch.sum_y
    tiny = 1e-12 * np.maximum(sketch.count, 1.0)
    has_pos, has_neg = pos > tiny, neg > tiny
    if not has_pos.any() or not has_neg.any():
        raise Undefined("one_class_only", "all outcomes are equal; the fit has no MLE")
    z_pos = sketch.sum_y_logit[has_pos] / pos[has_pos]
    z_neg = (sketch.sum_logit - sketch.sum_y_logit)[has_neg] / neg[has_neg]
    return _Design(
        z=np.concatenate([z_pos, z_neg]),
        y=np.concatenate([np.ones(z_pos.size), np.zeros(z_neg.size)]),
        w=np.concatenate([pos[has_pos], neg[has_neg]]),
        dz2=np.concatenate([_Z_WIDTH[has_pos], _Z_WIDTH[has_neg]]) ** 2,
        zabs=np.concatenate([_Z_ABS[has_pos], _Z_ABS[has_neg]]),
    )


def _ci(est: float, se: float, level: float) -> tuple[float, float]:
    q = float(special.ndtri(0.5 + level / 2.0))
    return (est - q * se, est + q * se)


def _fit_joint(d: _Design) -> LogisticFit:
    # Start at the calibrated model (a, b) = (0, 1): monitored models are near it.
    return fit_logistic(
        np.column_stack([np.ones(d.z.size), d.z]), d.y, sample_weight=d.w, start=(0.0, 1.0)
    )


def _weights(d: _Design) -> FloatArray:
    return np.ones(d.z.size) if d.w is None else d.w


def _joint(d: _Design, level: float) -> CoxCalibration:
    level = check_level(level)
    fit = _fit_joint(d)
    a, b = (float(v) for v in fit.coef)
    w = _weights(d)
    e = np.array(
        [np.sum(w * b * b * d.dz2) * _C2, np.sum(w * (abs(b) / 4.0 + b * b * d.zabs * _C2) * d.dz2)]
    )
    bound = np.abs(fit.cov) @ e
    se_a, se_b = (float(v) for v in fit.se)
    return CoxCalibration(
        a,
        b,
        se_a,
        se_b,
        _ci(a, se_a, level),
        _ci(b, se_b, level),
        fit.loglik,
        (float(bound[0]), float(bound[1])),
    )


def _citl(d: _Design, level: float) -> CalibrationInTheLarge:
    level = check_level(level)
    fit = fit_logistic(np.ones((d.z.size, 1)), d.y, sample_weight=d.w, offset=d.z)
    a0, se = float(fit.coef[0]), float(fit.se[0])
    bound = float(fit.cov[0, 0] * np.sum(_weights(d) * d.dz2) * _C2)
    return CalibrationInTheLarge(a0, se, _ci(a0, se, level), bound)


def _lr(d: _Design) -> RecalibrationTest:
    fit = _fit_joint(d)
    w = _weights(d)
    ll0 = float(np.sum(w * (d.y * d.z - np.logaddexp(0.0, d.z))))
    stat = max(2.0 * (fit.loglik - ll0), 0.0)
    b = float(fit.coef[1])
    bound = 2.0 * float(np.sum(w * d.dz2)) * (b * b + 1.0) / 8.0
    return RecalibrationTest(stat, 2, float(special.chdtrc(2, stat)), bound)


def cox_calibration(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    level: float = 0.95,
    sample_weight: ArrayLike | None = None,
) -> CoxCalibration:
    """Calibration intercept and slope by maximum likelihood, with Wald CIs.

    Raises ``Undefined("one_class_only")`` when all outcomes are equal and
    ``Undefined("no_mle")`` on separation.

    References
    ----------
    Cox, D. R. (1958). Two further applications of a model for binary
    regression. *Biometrika* 45(3/4), §3.
    """
    return _joint(_raw_design(y_true, y_prob, sample_weight), level)


def calibration_in_the_large(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    level: float = 0.95,
    sample_weight: ArrayLike | None = None,
) -> CalibrationInTheLarge:
    """Intercept ``a0`` of ``logit P = a0 + logit(p)`` (slope fixed at 1).

    References
    ----------
    Van Calster, B. et al. (2016). A calibration hierarchy for risk models was
    defined: from utopia to empirical data. *J. Clin. Epidemiol.* 74, §2.
    """
    return _citl(_raw_design(y_true, y_prob, sample_weight), level)


def recalibration_lr_test(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> RecalibrationTest:
    """``2(ℓ(â, b̂) − ℓ(0, 1))`` against χ²₂, with p clipped to [1e-6, 1−1e-6].

    References
    ----------
    Cox, D. R. (1958), §3; Miller, M. E., Hui, S. L. & Tierney, W. M. (1991).
    Validation techniques for logistic regression models. *Statistics in
    Medicine* 10(8) (from memory).
    """
    return _lr(_raw_design(y_true, y_prob, sample_weight))


def cox_calibration_from_sketch(sketch: Sketch, *, level: float = 0.95) -> CoxCalibration:
    """:func:`cox_calibration` on a sketch; ``bound`` per the module docstring."""
    return _joint(_sketch_design(sketch), level)


def calibration_in_the_large_from_sketch(
    sketch: Sketch, *, level: float = 0.95
) -> CalibrationInTheLarge:
    """:func:`calibration_in_the_large` on a sketch, with its first-order bound."""
    return _citl(_sketch_design(sketch), level)


def recalibration_lr_test_from_sketch(sketch: Sketch) -> RecalibrationTest:
    """:func:`recalibration_lr_test` on a sketch, with a bound on the statistic."""
    return _lr(_sketch_design(sketch))


def recalibration_from_sketch(
    sketch: Sketch, *, level: float = 0.95
) -> tuple[CoxCalibration, CalibrationInTheLarge]:
    """Both fits from one pseudo-row design (what :mod:`summary` needs)."""
    d = _sketch_design(sketch)
    return _joint(d, level), _citl(d, level)
