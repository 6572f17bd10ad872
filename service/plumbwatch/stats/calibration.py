"""Binned calibration statistics: ECE family, Hosmer–Lemeshow, Spiegelhalter, O/E.

Every statistic has a core that works on per-bin or per-group sums, so that
raw arrays and sketches share one formula. Equal-width bins use the rule
``b = min(floor(p*B), B-1)`` (METHODS.md §2.1): 0.3 lands in bin 3 of 10,
whereas libraries built on ``np.linspace`` edges put it in bin 2.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair, check_level, check_positive_int

FloatArray = NDArray[np.float64]


# -- binning ----------------------------------------------------------------


def equal_width_bins(y_prob: FloatArray, n_bins: int) -> NDArray[np.intp]:
    """Bin of each p under ``min(floor(p*B), B-1)``."""
    return np.minimum(np.floor(y_prob * n_bins), n_bins - 1).astype(np.intp)


def equal_mass_groups(y_prob: FloatArray, weight: FloatArray, n_groups: int) -> NDArray[np.intp]:
    """Group of each row for equal-mass bins, never splitting tied p values.

    Rows are sorted by p (stable); cut ``k`` falls after the rows whose weight
    centre lies below ``k/g`` of the total (``round(k n / g)`` rows when
    unweighted), then moves forward past a run of ties. Duplicate cuts
    collapse, so fewer than ``n_groups`` groups can come back.
    """
    order = np.argsort(y_prob, kind="stable")
    ps = y_prob[order]
    cw = np.cumsum(weight[order])
    centres = cw - weight[order] / 2.0
    targets = cw[-1] * np.arange(1, n_groups) / n_groups
    cuts = np.searchsorted(centres, targets, side="left")
    cuts = cuts[(cuts > 0) & (cuts < ps.size)]
    # A cut at c separates ps[c-1] and ps[c]; move it forward past equal values.
    cuts = np.searchsorted(ps, ps[cuts - 1], side="right")
    cuts = np.unique(cuts[cuts < ps.size])
    labels_sorted = np.searchsorted(cuts, np.arange(ps.size), side="right")
    groups = np.empty(ps.size, dtype=np.intp)
    groups[order] = labels_sorted
    return groups


def _sums(
    y: FloatArray, p: FloatArray, w: FloatArray, b: NDArray[np.intp]
) -> tuple[FloatArray, FloatArray, FloatArray]:
    size = int(b.max()) + 1 if b.size else 0
    return (
        np.asarray(np.bincount(b, weights=w, minlength=size), dtype=np.float64),
        np.asarray(np.bincount(b, weights=w * y, minlength=size), dtype=np.float64),
        np.asarray(np.bincount(b, weights=w * p, minlength=size), dtype=np.float64),
    )


def _prepare(
    y_true: ArrayLike, y_prob: ArrayLike, sample_weight: ArrayLike | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = np.ones(y.size) if w is None else w
    if ww.sum() <= 0.0:
        raise Undefined("no_rows", "there are no rows (or all weights are zero)")
    return y, p, ww


# -- ECE --------------------------------------------------------------------


def ece_from_bins(count: ArrayLike, sum_y: ArrayLike, sum_p: ArrayLike) -> float:
    """``Σ_b (n_b/n) |ȳ_b − p̄_b| = Σ_b |O_b − E_b| / n`` over non-empty bins."""
    n_b = np.asarray(count, dtype=np.float64)
    n = float(n_b.sum())
    if n <= 0.0:
        raise Undefined("no_rows", "there are no rows")
    return float(np.sum(np.abs(np.asarray(sum_y) - np.asarray(sum_p))[n_b > 0]) / n)


def expected_calibration_error(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    n_bins: int = 10,
    strategy: Literal["uniform", "quantile"] = "uniform",
    sample_weight: ArrayLike | None = None,
) -> float:
    """Expected calibration error with equal-width or equal-mass bins.

    Parameters
    ----------
    n_bins : int
        Number of bins (equal-mass may realise fewer because of ties).
    strategy : {"uniform", "quantile"}
        ``"uniform"``: rule ``min(floor(p*B), B-1)``. ``"quantile"``: see
        :func:`equal_mass_groups`.

    References
    ----------
    Naeini, M. P., Cooper, G. F. & Hauskrecht, M. (2015). Obtaining well
    calibrated probabilities using Bayesian binning. *AAAI*, §4 (ECE).

    Examples
    --------
    >>> p = [.05, .15, .15, .25, .55, .65, .95, .95]
    >>> round(expected_calibration_error([0, 0, 1, 0, 1, 0, 1, 1], p), 12)
    0.275
    """
    y, p, w = _prepare(y_true, y_prob, sample_weight)
    n_bins = check_positive_int(n_bins, "n_bins")
    if strategy == "uniform":
        b = equal_width_bins(p, n_bins)
    elif strategy == "quantile":
        b = equal_mass_groups(p, w, n_bins)
    else:
        raise ValueError(f"strategy: expected 'uniform' or 'quantile', got {strategy!r}")
    return ece_from_bins(*_sums(y, p, w, b))


def l2_calibration_error_from_bins(
    count: ArrayLike, sum_y: ArrayLike, sum_p: ArrayLike, *, debiased: bool = True
) -> float:
    """Binned L2 calibration error, optionally with the Kumar et al. bias correction.

    Debiased: for bins with ``n_b >= 2`` subtract ``ȳ_b(1-ȳ_b)/(n_b-1)`` from
    ``(p̄_b - ȳ_b)^2``; bins with one row contribute 0; report
    ``sqrt(max(Σ (n_b/n) T_b, 0))``. Counts are treated as row counts.
    """
    n_b = np.asarray(count, dtype=np.float64)
    n = float(n_b.sum())
    if n <= 0.0:
        raise Undefined("no_rows", "there are no rows")
    keep = n_b > 0
    n_b = n_b[keep]
    ybar = np.asarray(sum_y, dtype=np.float64)[keep] / n_b
    pbar = np.asarray(sum_p, dtype=np.float64)[keep] / n_b
    t = (pbar - ybar) ** 2
    if debiased:
        many = n_b >= 2
        t = np.where(many, t - ybar * (1.0 - ybar) / np.where(many, n_b - 1.0, 1.0), 0.0)
    return float(np.sqrt(max(float(np.sum(n_b * t)) / n, 0.0)))


def l2_calibration_error(
    y_true: ArrayLike, y_prob: ArrayLike, *, n_bins: int = 10, debiased: bool = True
) -> float:
    """L2 calibration error on equal-width bins; ``debiased`` per Kumar et al.

    References
    ----------
    Kumar, A., Liang, P. & Ma, T. (2019). Verified uncertainty calibration.
    *NeurIPS*, §5 (debiased estimator).
    """
    y, p, w = _prepare(y_true, y_prob, None)
    n_bins = check_positive_int(n_bins, "n_bins")
    return l2_calibration_error_from_bins(
        *_sums(y, p, w, equal_width_bins(p, n_bins)), debiased=debiased
    )


# -- Hosmer–Lemeshow -------------------------------------------------------


@dataclass(frozen=True)
class HosmerLemeshowResult:
    statistic: float
    df: int
    p_value: float
    n_groups: int


def merge_degenerate_groups(
    count: FloatArray, observed: FloatArray, expected: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Merge groups with ``E = 0`` or ``E = n`` (undefined terms) into a neighbour."""
    n, o, e = [list(map(float, a)) for a in (count, observed, expected)]
    i = 0
    while len(n) > 1 and i < len(n):
        if n[i] <= 0 or e[i] <= 0.0 or e[i] >= n[i]:
            j = i + 1 if i + 1 < len(n) else i - 1
            n[j] += n[i]
            o[j] += o[i]
            e[j] += e[i]
            del n[i], o[i], e[i]
            i = max(min(i, j) - 1, 0)
            continue
        i += 1
    return np.array(n), np.array(o), np.array(e)


def hosmer_lemeshow_from_groups(
    count: ArrayLike,
    observed: ArrayLike,
    expected: ArrayLike,
    *,
    dof: Literal["external", "development"] = "external",
) -> HosmerLemeshowResult:
    """Ĉ = Σ (O − E)² / (E (1 − E/n)) over groups; df g' (external) or g' − 2."""
    n, o, e = merge_degenerate_groups(
        np.asarray(count, float), np.asarray(observed, float), np.asarray(expected, float)
    )
    v = e * (1.0 - e / n)
    if n.size == 0 or not np.all(v > 0.0):
        raise Undefined("zero_variance", "every forecast is 0 or 1; HL is undefined")
    stat = float(np.sum((o - e) ** 2 / v))
    g = int(n.size)
    df = g if dof == "external" else g - 2
    if dof not in ("external", "development"):
        raise ValueError(f"dof: expected 'external' or 'development', got {dof!r}")
    if df < 1:
        raise Undefined("too_few_groups", f"{g} groups leave {df} degrees of freedom")
    return HosmerLemeshowResult(stat, df, float(special.chdtrc(df, stat)), g)


def hosmer_lemeshow(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    n_groups: int = 10,
    dof: Literal["external", "development"] = "external",
    sample_weight: ArrayLike | None = None,
) -> HosmerLemeshowResult:
    """Hosmer–Lemeshow Ĉ on deciles of risk.

    Groups come from :func:`equal_mass_groups` (ties never split); groups with
    ``E = 0`` or ``E = n`` merge with a neighbour, and the realised number of
    groups g' sets the df: g' for external data (a fixed model on new data,
    the monitoring case), g' − 2 when the model was fitted on these data.

    References
    ----------
    Hosmer, D. W. & Lemeshow, S. (1980). Goodness of fit tests for the multiple
    logistic regression model. *Comm. Statist. Theory Methods* 9(10), §2.
    Hosmer, D. W., Lemeshow, S. & Sturdivant, R. X. (2013). *Applied Logistic
    Regression*, 3rd ed., §5.2.2 (external validation: g df; from memory).
    """
    y, p, w = _prepare(y_true, y_prob, sample_weight)
    n_groups = check_positive_int(n_groups, "n_groups", minimum=2)
    n, o, e = _sums(y, p, w, equal_mass_groups(p, w, n_groups))
    return hosmer_lemeshow_from_groups(n, o, e, dof=dof)


# -- Spiegelhalter ----------------------------------------------------------


@dataclass(frozen=True)
class SpiegelhalterResult:
    z: float
    p_value: float


def spiegelhalter_from_sums(numerator: float, variance: float) -> SpiegelhalterResult:
    """Z from ``Σ (y−p)(1−2p)`` and ``Σ (1−2p)² p(1−p)``; two-sided p-value."""
    if not variance > 0.0:
        raise Undefined("zero_variance", "every forecast is 0, 0.5 or 1")
    z = float(numerator / np.sqrt(variance))
    return SpiegelhalterResult(z, float(2.0 * special.ndtr(-abs(z))))


def spiegelhalter_z(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> SpiegelhalterResult:
    """Spiegelhalter's Z test of calibration, based on the Brier score.

    References
    ----------
    Spiegelhalter, D. J. (1986). Probabilistic prediction in patient management
    and clinical trials. *Statistics in Medicine* 5(5), §3.
    Rufibach, K. (2010). Use of Brier score to assess binary predictions.
    *J. Clin. Epidemiol.* 63(8), Table 1.
    """
    y, p, w = _prepare(y_true, y_prob, sample_weight)
    a = 1.0 - 2.0 * p
    return spiegelhalter_from_sums(
        float(np.dot(w, (y - p) * a)), float(np.dot(w, a * a * p * (1.0 - p)))
    )


# -- O/E --------------------------------------------------------------------


@dataclass(frozen=True)
class ObservedExpected:
    """O/E with a ``level`` interval; z and p from the normal approximation."""

    observed: float
    expected: float
    ratio: float
    low: float
    high: float
    z: float | None
    p_value: float | None
    method: str


def observed_expected_from_sums(
    observed: float,
    expected: float,
    n: float,
    variance: float,
    *,
    level: float = 0.95,
    method: Literal["log", "poisson"] = "log",
) -> ObservedExpected:
    """O/E from ``O = Σy``, ``E = Σp``, ``n`` and ``Σ p(1-p)``.

    ``"log"``: ``exp(ln(O/E) ± z sqrt((1 − O/n)/O))``; with O = 0 or O = n,
    where that SE degenerates, the Poisson limits below are used. ``"poisson"``:
    Garwood limits ``[χ²_{α/2}(2O)/2, χ²_{1−α/2}(2O+2)/2] / E``.
    """
    level = check_level(level)
    if expected <= 0.0:
        raise Undefined("zero_expected", "every forecast is 0, so E = 0")
    alpha = 1.0 - level
    q = float(special.ndtri(1.0 - alpha / 2.0))
    ratio = observed / expected
    # chdtri(v, a) is the chi-square quantile with upper-tail probability a.
    poisson_high = float(special.chdtri(2.0 * observed + 2.0, alpha / 2.0) / 2.0) / expected
    if method == "poisson":
        low = (
            0.0 if observed == 0 else float(special.chdtri(2.0 * observed, 1.0 - alpha / 2.0) / 2.0)
        )
        low, high = low / expected, poisson_high
    elif method == "log":
        if observed == 0 or observed >= n:
            # The delta-method SE is 0 or undefined at the ends; use exact limits.
            low = (
                0.0
                if observed == 0
                else float(special.chdtri(2.0 * observed, 1.0 - alpha / 2.0) / 2.0) / expected
            )
            high = poisson_high
        else:
            se = float(np.sqrt(max(1.0 - observed / n, 0.0) / observed))
            low, high = ratio * float(np.exp(-q * se)), ratio * float(np.exp(q * se))
    else:
        raise ValueError(f"method: expected 'log' or 'poisson', got {method!r}")
    z = p = None
    if variance > 0.0:
        z = float((observed - expected) / np.sqrt(variance))
        p = float(2.0 * special.ndtr(-abs(z)))
    return ObservedExpected(observed, expected, ratio, low, high, z, p, method)


def observed_expected(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    level: float = 0.95,
    method: Literal["log", "poisson"] = "log",
    sample_weight: ArrayLike | None = None,
) -> ObservedExpected:
    """Observed over expected events, ``Σy / Σp``, with a confidence interval.

    References
    ----------
    Riley, R. D. et al. (2021). Minimum sample size for external validation of
    a clinical prediction model with a binary outcome. *Statistics in Medicine*
    40(19), §3.2 (SE of ln O/E). Ulm, K. (1990). A simple method to calculate
    the confidence interval of a standardized mortality ratio. *Am. J.
    Epidemiol.* 131(2) (Poisson limits; from memory).
    """
    y, p, w = _prepare(y_true, y_prob, sample_weight)
    return observed_expected_from_sums(
        float(np.dot(w, y)),
        float(np.dot(w, p)),
        float(w.sum()),
        float(np.dot(w, p * (1.0 - p))),
        level=level,
        method=method,
    )
