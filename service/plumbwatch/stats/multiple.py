"""False discovery rate control across slices at one evaluation run.

* :func:`benjamini_hochberg` for p-values that are independent or positively
  dependent (PRDS);
* :func:`benjamini_yekutieli` for arbitrary dependence, e.g. nested slices
  (overall ⊃ region ⊃ region × tier);
* :func:`e_bh` for e-values, valid under arbitrary dependence.

Feed e-BH the *current* e-values at the run, never running maxima: the
maxima are not e-values (METHODS.md §7.4). The guarantee is per run.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]


@dataclass(frozen=True, eq=False)
class Discoveries:
    """Outcome of a multiple-testing procedure, in the order of the input.

    ``adjusted`` holds adjusted p-values (BH, BY) or, for e-BH, the smallest
    level at which each hypothesis would be rejected; ``n_rejected`` is the
    number of discoveries at ``alpha``.
    """

    rejected: BoolArray
    adjusted: FloatArray
    alpha: float
    n_rejected: int
    method: str


def _check_alpha(alpha: float) -> float:
    if not 0.0 < float(alpha) < 1.0:
        raise ValueError(f"alpha: expected a value in (0, 1), got {alpha!r}")
    return float(alpha)


def _check_values(values: ArrayLike, name: str, *, upper: float) -> FloatArray:
    v = np.asarray(values, dtype=np.float64)
    if v.ndim != 1:
        raise ValueError(f"{name}: expected a 1-D array, got shape {v.shape}")
    ok = (v >= 0.0) & (v <= upper)
    if not ok.all():
        what = "[0, 1]" if upper == 1.0 else "[0, inf]"
        raise ValueError(f"{name}: expected values in {what}, got {v[~ok][0]!r}")
    return v


def _step_up(p: FloatArray, alpha: float, scale: float, method: str) -> Discoveries:
    m = p.shape[0]
    if m == 0:
        return Discoveries(np.zeros(0, bool), np.zeros(0), alpha, 0, method)
    # Stable sort so that ties are handled identically whatever the input order.
    order = np.argsort(p, kind="stable")
    ranked = p[order] * (m * scale) / np.arange(1, m + 1)
    # Step-up: the adjusted value is the running minimum from the largest p down.
    adj_sorted = np.minimum(np.minimum.accumulate(ranked[::-1])[::-1], 1.0)
    adjusted = np.empty(m)
    adjusted[order] = adj_sorted
    rejected = adjusted <= alpha
    return Discoveries(rejected, adjusted, alpha, int(rejected.sum()), method)


def benjamini_hochberg(p_values: ArrayLike, *, alpha: float = 0.05) -> Discoveries:
    """Benjamini–Hochberg step-up procedure.

    Rejects the ``k*`` smallest p-values, ``k* = max{k : p_(k) <= k alpha / m}``.
    Adjusted p-values ``min_{j>=i} min(1, m p_(j) / j)`` equal statsmodels'
    ``multipletests(method='fdr_bh')``.

    References
    ----------
    Benjamini & Hochberg, "Controlling the false discovery rate", JRSS B 57
    (1995), 289-300; METHODS.md §7.4.

    Examples
    --------
    >>> benjamini_hochberg([0.001, 0.008, 0.039, 0.041], alpha=0.05).n_rejected
    4
    """
    alpha = _check_alpha(alpha)
    return _step_up(_check_values(p_values, "p_values", upper=1.0), alpha, 1.0, "bh")


def benjamini_yekutieli(p_values: ArrayLike, *, alpha: float = 0.05) -> Discoveries:
    """Benjamini–Yekutieli: BH at level ``alpha / sum_{i<=m} 1/i``, any dependence.

    References
    ----------
    Benjamini & Yekutieli, "The control of the false discovery rate in
    multiple testing under dependency", Annals of Statistics 29 (2001).
    """
    alpha = _check_alpha(alpha)
    p = _check_values(p_values, "p_values", upper=1.0)
    harmonic = float(np.sum(1.0 / np.arange(1, p.shape[0] + 1))) if p.shape[0] else 1.0
    return _step_up(p, alpha, harmonic, "by")


def e_bh(e_values: ArrayLike, *, alpha: float = 0.05) -> Discoveries:
    """e-BH: reject the ``k*`` largest e-values, ``k* = max{k : e_(k) >= m / (alpha k)}``.

    Valid under arbitrary dependence between the e-values. ``adjusted`` is
    ``min(1, min_{j>=i} m / (j e_(j)))`` with e in decreasing order, i.e. the
    smallest alpha at which the hypothesis is rejected (BH applied to
    ``1/e``).

    References
    ----------
    Wang & Ramdas, "False discovery rate control with e-values", JRSS B 84(3)
    (2022), arXiv 2009.02824; METHODS.md §7.4.

    Examples
    --------
    >>> e_bh([50, 30, 8, 2, 1, 0.5], alpha=0.1).rejected.tolist()
    [True, True, False, False, False, False]
    """
    alpha = _check_alpha(alpha)
    e = _check_values(e_values, "e_values", upper=np.inf)
    with np.errstate(divide="ignore"):
        inverse = np.where(e > 0, 1.0 / np.where(e > 0, e, 1.0), np.inf)
    # e-BH is BH on the "p-values" 1/e (which need not be valid p-values); the
    # step-up on 1/e can exceed one, so cap after the running minimum.
    m = e.shape[0]
    if m == 0:
        return Discoveries(np.zeros(0, bool), np.zeros(0), alpha, 0, "e_bh")
    order = np.argsort(inverse, kind="stable")
    ranked = inverse[order] * m / np.arange(1, m + 1)
    adj_sorted = np.minimum(np.minimum.accumulate(ranked[::-1])[::-1], 1.0)
    adjusted = np.empty(m)
    adjusted[order] = adj_sorted
    # Compare in the e scale, e_(k) >= m / (alpha k), to avoid rounding in 1/e.
    k_ok = e[order] * alpha * np.arange(1, m + 1) >= m
    k_star = int(np.flatnonzero(k_ok)[-1]) + 1 if k_ok.any() else 0
    rejected = np.zeros(m, dtype=bool)
    rejected[order[:k_star]] = True
    return Discoveries(rejected, adjusted, alpha, k_star, "e_bh")


__all__ = ["Discoveries", "benjamini_hochberg", "benjamini_yekutieli", "e_bh"]
