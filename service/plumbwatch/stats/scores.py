"""Proper scores for binary forecasts and the Murphy decomposition of Brier.

Log loss clips at float64 machine epsilon, as scikit-learn >= 1.5 does
(METHODS.md §1.1): a forecast of exactly 0 or 1 that is contradicted costs
``-ln(2.22e-16) ≈ 36.04`` nats rather than infinity. Count such rows
separately (:func:`falsified_count`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair, check_positive_int

LOG_LOSS_EPS = float(np.finfo(np.float64).eps)


def _weights(w: NDArray[np.float64] | None, n: int) -> NDArray[np.float64]:
    return np.ones(n) if w is None else w


def _total(w: NDArray[np.float64]) -> float:
    total = float(w.sum())
    if total <= 0.0:
        raise Undefined("no_rows", "there are no rows (or all weights are zero)")
    return total


def log_loss(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> float:
    """Mean negative log-likelihood in nats, p clipped to ``[eps, 1 - eps]``.

    ``eps`` is :data:`LOG_LOSS_EPS` (float64 machine epsilon). Divide by
    ``ln 2`` for bits.

    References
    ----------
    Good, I. J. (1952). Rational decisions. *J. R. Stat. Soc. B* 14(1), §8.

    Examples
    --------
    >>> round(log_loss([1, 0, 1], [0.0, 1.0, 0.5]), 6)
    24.260151
    """
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = _weights(w, y.size)
    pc = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
    per_row = -(y * np.log(pc) + (1.0 - y) * np.log(1.0 - pc))
    return float(np.dot(ww, per_row) / _total(ww))


def brier_score(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> float:
    """Mean squared difference ``(p - y)^2`` (one-column convention, in [0, 1]).

    References
    ----------
    Brier, G. W. (1950). Verification of forecasts expressed in terms of
    probability. *Monthly Weather Review* 78(1).
    """
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = _weights(w, y.size)
    return float(np.dot(ww, (p - y) ** 2) / _total(ww))


def falsified_count(y_true: ArrayLike, y_prob: ArrayLike) -> int:
    """Rows with p = 0 and y = 1, or p = 1 and y = 0 (forecasts refuted outright)."""
    y, p, _ = check_binary_pair(y_true, y_prob)
    return int(np.sum(((p == 0.0) & (y == 1.0)) | ((p == 1.0) & (y == 0.0))))


@dataclass(frozen=True)
class BrierDecomposition:
    """``brier = reliability - resolution + uncertainty + within_variance - within_covariance``.

    The last two (Stephenson et al. 2008) are 0 when bins hold identical
    forecasts (``n_bins=None``), where the Murphy identity is exact.
    """

    brier: float
    reliability: float
    resolution: float
    uncertainty: float
    within_variance: float
    within_covariance: float


def decomposition_from_bins(
    count: ArrayLike, sum_y: ArrayLike, sum_p: ArrayLike, sum_p2: ArrayLike, sum_py: ArrayLike
) -> BrierDecomposition:
    """Decomposition from per-bin sums (shared by the raw and sketch paths)."""
    n_b = np.asarray(count, dtype=np.float64)
    o = np.asarray(sum_y, dtype=np.float64)
    s = np.asarray(sum_p, dtype=np.float64)
    s2 = np.asarray(sum_p2, dtype=np.float64)
    spy = np.asarray(sum_py, dtype=np.float64)
    n = _total(n_b)
    keep = n_b > 0
    n_b, o, s, s2, spy = n_b[keep], o[keep], s[keep], s2[keep], spy[keep]
    pbar = s / n_b
    obar = o / n_b
    ybar = o.sum() / n
    rel = float(np.sum(n_b * (pbar - obar) ** 2) / n)
    res = float(np.sum(n_b * (obar - ybar) ** 2) / n)
    unc = float(ybar * (1.0 - ybar))
    wbv = float(np.sum(s2 - n_b * pbar**2) / n)
    wbc = float(2.0 * np.sum(spy - n_b * pbar * obar) / n)
    brier = float((s2.sum() - 2.0 * spy.sum() + o.sum()) / n)
    return BrierDecomposition(brier, rel, res, unc, wbv, wbc)


def brier_decomposition(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    n_bins: int | None = 10,
    sample_weight: ArrayLike | None = None,
) -> BrierDecomposition:
    """Murphy's reliability / resolution / uncertainty partition of the Brier score.

    Parameters
    ----------
    n_bins : int or None
        Equal-width bins with the rule ``b = min(floor(p*B), B-1)``; ``None``
        groups identical forecast values (the exact Murphy partition).

    References
    ----------
    Murphy, A. H. (1973). A new vector partition of the probability score.
    *J. Applied Meteorology* 12(4). Stephenson, D. B., Coelho, C. A. S. &
    Jolliffe, I. T. (2008). Two extra components in the Brier score
    decomposition. *Weather and Forecasting* 23(4), §2.
    """
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = _weights(w, y.size)
    if n_bins is None:
        _, b = np.unique(p, return_inverse=True)
        size = int(b.max()) + 1 if b.size else 0
    else:
        size = check_positive_int(n_bins, "n_bins")
        b = np.minimum(np.floor(p * size), size - 1).astype(np.intp)
    sums = [np.bincount(b, weights=ww * t, minlength=size) for t in (1.0, y, p, p * p, p * y)]
    return decomposition_from_bins(*sums)
