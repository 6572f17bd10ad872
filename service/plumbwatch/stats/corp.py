"""CORP reliability curves and the MCB − DSC + UNC score decomposition.

The recalibrated forecast ``p̂`` is the isotonic (PAV) regression of y on p
with tied p pooled first, so equal forecasts get equal ``p̂``. For a proper
score S with mean ``S̄``: ``MCB = S̄(p) − S̄(p̂)``, ``DSC = S̄(ȳ) − S̄(p̂)``,
``UNC = S̄(ȳ)``, hence ``S̄(p) = MCB − DSC + UNC`` exactly. The log-score
``S̄(p)`` is the reported log loss (clipped at float64 eps); ``S̄(p̂)`` uses
``xlogy`` and is finite although ``p̂`` may be exactly 0 or 1.

On a sketch the PAV runs over grid bins (each bin a tied forecast). It fits
within a smaller class of step functions, so ``MCB`` and ``DSC`` are each at
most their raw-data values (by the same amount, the loss of fit); UNC and the
identity are exact.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import xlogy

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair, check_level, check_positive_int
from plumbwatch.stats.scores import LOG_LOSS_EPS
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]

try:  # scipy >= 1.12
    from scipy.optimize import isotonic_regression as _scipy_pav
except ImportError:  # pragma: no cover - older scipy
    _scipy_pav = None


def pav_grouped(values: ArrayLike, weights: ArrayLike) -> FloatArray:
    """Nondecreasing weighted least-squares fit to ``values`` in the given order.

    Pool-adjacent-violators: scipy's compiled version when available
    (scipy >= 1.12), else a stack of blocks in Python; both O(m).

    References
    ----------
    Ayer, M. et al. (1955). An empirical distribution function for sampling
    with incomplete information. *Ann. Math. Statist.* 26(4), §2.
    """
    v = np.asarray(values, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if _scipy_pav is not None and v.size:
        return np.asarray(_scipy_pav(v, weights=w).x, dtype=np.float64)
    means: list[float] = []
    wsum: list[float] = []
    sizes: list[int] = []
    for vi, wi in zip(v.tolist(), w.tolist(), strict=True):
        means.append(vi)
        wsum.append(wi)
        sizes.append(1)
        while len(means) > 1 and means[-2] >= means[-1]:
            w2 = wsum[-2] + wsum[-1]
            m2 = (means[-2] * wsum[-2] + means[-1] * wsum[-1]) / w2 if w2 > 0 else means[-1]
            s2 = sizes[-2] + sizes[-1]
            del means[-1], wsum[-1], sizes[-1]
            means[-1], wsum[-1], sizes[-1] = m2, w2, s2
    return np.repeat(np.array(means), np.array(sizes, dtype=np.intp))


def _groups(
    y: FloatArray, p: FloatArray, w: FloatArray
) -> tuple[FloatArray, NDArray[np.intp], FloatArray, FloatArray]:
    x, inv = np.unique(p, return_inverse=True)
    n_g = np.asarray(np.bincount(inv, weights=w, minlength=x.size), dtype=np.float64)
    o_g = np.asarray(np.bincount(inv, weights=w * y, minlength=x.size), dtype=np.float64)
    return x, inv, n_g, o_g


def isotonic_calibration(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> FloatArray:
    """PAV-recalibrated probability of every row (ties pooled), in [0, 1].

    Equals ``IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip")``
    fitted and applied in-sample.
    """
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = np.ones(y.size) if w is None else w
    x, inv, n_g, o_g = _groups(y, p, ww)
    keep = n_g > 0
    fit = np.zeros(x.size)
    fit[keep] = pav_grouped(o_g[keep] / n_g[keep], n_g[keep])
    return fit[inv]


@dataclass(frozen=True)
class ScoreDecomposition:
    """``score = mcb − dsc + unc`` for one proper score."""

    score: float
    mcb: float
    dsc: float
    unc: float


@dataclass(frozen=True)
class CorpDecomposition:
    brier: ScoreDecomposition
    log: ScoreDecomposition


def _decompose(
    n_g: FloatArray, o_g: FloatArray, fit: FloatArray, brier: float, log_loss: float
) -> CorpDecomposition:
    n = float(n_g.sum())
    if n <= 0.0:
        raise Undefined("no_rows", "there are no rows")
    ybar = float(o_g.sum()) / n
    bs_hat = float(np.sum(n_g * fit**2 - 2.0 * fit * o_g + o_g)) / n
    bs_ref = ybar * (1.0 - ybar)
    ll_hat = -float(np.sum(xlogy(o_g, fit) + xlogy(n_g - o_g, 1.0 - fit))) / n
    ll_ref = 0.0 - float(xlogy(ybar, ybar) + xlogy(1.0 - ybar, 1.0 - ybar))
    return CorpDecomposition(
        ScoreDecomposition(brier, brier - bs_hat, bs_ref - bs_hat, bs_ref),
        ScoreDecomposition(log_loss, log_loss - ll_hat, ll_ref - ll_hat, ll_ref),
    )


def corp_decomposition(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> CorpDecomposition:
    """MCB, DSC and UNC for the Brier and log scores, from one PAV fit.

    References
    ----------
    Dimitriadis, T., Gneiting, T. & Jordan, A. I. (2021). Stable reliability
    diagrams for probabilistic classifiers. *PNAS* 118(8), e2016191118,
    "CORP score decomposition" (eq. 3).
    """
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = np.ones(y.size) if w is None else w
    x, _, n_g, o_g = _groups(y, p, ww)
    keep = n_g > 0
    n_g, o_g, x = n_g[keep], o_g[keep], x[keep]
    fit = pav_grouped(o_g / n_g, n_g) if n_g.size else np.zeros(0)
    n = float(ww.sum())
    pc = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
    brier = float(np.dot(ww, (p - y) ** 2)) / n if n > 0 else 0.0
    ll = -float(np.dot(ww, y * np.log(pc) + (1.0 - y) * np.log(1.0 - pc))) / n if n > 0 else 0.0
    return _decompose(n_g, o_g, fit, brier, ll)


def corp_decomposition_from_sketch(sketch: Sketch) -> CorpDecomposition:
    """:func:`corp_decomposition` with the grid bins as tied forecasts (see module doc)."""
    keep = sketch.count > 0
    n_g, o_g = sketch.count[keep], sketch.sum_y[keep]
    fit = pav_grouped(o_g / n_g, n_g) if n_g.size else np.zeros(0)
    n = sketch.n
    if n <= 0.0:
        raise Undefined("no_rows", "the sketch is empty")
    return _decompose(
        n_g,
        o_g,
        np.clip(fit, 0.0, 1.0),
        sketch.total("sum_brier") / n,
        sketch.total("sum_log_loss") / n,
    )


@dataclass(frozen=True)
class ReliabilityCurve:
    """CORP reliability diagram: step function ``fitted`` over ``forecast``.

    ``band_low``/``band_high`` is the consistency band: where the curve would
    lie, pointwise, in ``level`` of resamples if the forecasts were calibrated.
    """

    forecast: FloatArray
    fitted: FloatArray
    weight: FloatArray
    band_low: FloatArray
    band_high: FloatArray
    level: float


def _curve(
    x: FloatArray, n_g: FloatArray, o_g: FloatArray, level: float, n_resamples: int, seed: int
) -> ReliabilityCurve:
    fit = pav_grouped(o_g / n_g, n_g)
    rng = np.random.default_rng(seed)
    counts = np.maximum(np.rint(n_g), 1).astype(np.int64)
    sims = np.empty((n_resamples, x.size))
    for r in range(n_resamples):
        ys = rng.binomial(counts, np.clip(x, 0.0, 1.0))
        sims[r] = pav_grouped(ys / counts, counts)
    alpha = 1.0 - level
    low, high = np.quantile(sims, [alpha / 2.0, 1.0 - alpha / 2.0], axis=0)
    return ReliabilityCurve(x, fit, n_g, low, high, level)


def reliability_curve(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    *,
    level: float = 0.9,
    n_resamples: int = 200,
    seed: int = 0,
) -> ReliabilityCurve:
    """CORP reliability curve with a consistency band from resampling under H0.

    The band redraws ``y* ~ Bernoulli(p)`` ``n_resamples`` times (fixed
    ``seed``) and refits PAV; it is a pointwise band around the diagonal.

    References
    ----------
    Dimitriadis, T., Gneiting, T. & Jordan, A. I. (2021), PNAS 118(8),
    "Uncertainty quantification" (consistency bands by resampling).
    """
    y, p, _ = check_binary_pair(y_true, y_prob)
    level = check_level(level)
    n_resamples = check_positive_int(n_resamples, "n_resamples")
    if y.size == 0:
        raise Undefined("no_rows", "there are no rows")
    x, _, n_g, o_g = _groups(y, p, np.ones(y.size))
    return _curve(x, n_g, o_g, level, n_resamples, seed)


def reliability_curve_from_sketch(
    sketch: Sketch, *, level: float = 0.9, n_resamples: int = 200, seed: int = 0
) -> ReliabilityCurve:
    """The CORP curve over grid bins, at each bin's mean forecast."""
    level = check_level(level)
    n_resamples = check_positive_int(n_resamples, "n_resamples")
    keep = sketch.count > 0
    if not keep.any():
        raise Undefined("no_rows", "the sketch is empty")
    n_g, o_g = sketch.count[keep], sketch.sum_y[keep]
    return _curve(sketch.sum_p[keep] / n_g, n_g, o_g, level, n_resamples, seed)
