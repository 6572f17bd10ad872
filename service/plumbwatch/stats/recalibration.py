"""Recalibration maps the service can suggest, and an honest estimate of their gain.

Binary maps (fit on matured data only, METHODS.md §10):

* Platt / logistic: ``q = sigmoid(A + B logit p)``;
* beta calibration: ``q = sigmoid(c + a ln p - b ln(1 - p))`` with ``a, b >= 0``;
* isotonic: the pool-adjacent-violators fit, interpolated linearly in ``p``.

Every map clips its input and output to ``[eps, 1 - eps]`` (``eps = 1e-6``, the
e-process and logistic-fit clip), so that logits and log losses stay finite.
A map exports a knot table (:meth:`RecalibrationMap.knots`) for pipelines.

Multiclass: temperature scaling (:func:`fit_temperature`).

Gains measured on the fitting data are optimistic (isotonic badly so);
:func:`cross_fitted_gain` reports the out-of-fold gain with its paired
standard error and the in-sample value beside it for contrast.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize
from scipy.special import expit, log_softmax

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair, check_positive_int
from plumbwatch.stats.corp import pav_grouped
from plumbwatch.stats.logistic import fit_logistic

FloatArray = NDArray[np.float64]

EPS = 1e-6
METHODS = ("platt", "beta", "isotonic")
# Knot tables are built to reproduce ``apply`` within this on (1e-4, 1 - 1e-4):
# the refinement tolerance is a quarter of the promise, since only midpoints are checked.
KNOT_TOLERANCE = 1e-3
_EMPTY = np.zeros(0)


def _logit(p: FloatArray) -> FloatArray:
    out: FloatArray = np.log(p) - np.log1p(-p)
    return out


@dataclass(frozen=True, eq=False)
class RecalibrationMap:
    """A fitted binary recalibration map.

    ``params`` are ``(A, B)`` for ``"platt"`` and ``(a, b, c)`` for
    ``"beta"``; ``x`` and ``y`` are the isotonic fit's knots (empty
    otherwise). ``n`` is the number of rows it was fitted on.
    """

    method: str
    params: tuple[float, ...] = ()
    x: FloatArray = field(default_factory=lambda: _EMPTY)
    y: FloatArray = field(default_factory=lambda: _EMPTY)
    n: int = 0
    eps: float = EPS

    def apply(self, y_prob: ArrayLike) -> FloatArray:
        """Recalibrated probabilities ``q`` for ``y_prob``, clipped to ``[eps, 1 - eps]``."""
        p = np.clip(np.asarray(y_prob, dtype=np.float64), self.eps, 1.0 - self.eps)
        if self.method == "platt":
            a, b = self.params
            q = expit(a + b * _logit(p))
        elif self.method == "beta":
            a, b, c = self.params
            q = expit(c + a * np.log(p) - b * np.log1p(-p))
        elif self.method == "isotonic":
            q = np.interp(p, self.x, self.y)  # constant beyond the end knots
        else:
            raise ValueError(f"method: expected one of {METHODS}, got {self.method!r}")
        out: FloatArray = np.clip(q, self.eps, 1.0 - self.eps)
        return out

    def to_dict(self) -> dict[str, object]:
        """A JSON-able dict (floats round-trip exactly)."""
        return {
            "version": 1,
            "method": self.method,
            "params": list(self.params),
            "x": self.x.tolist(),
            "y": self.y.tolist(),
            "n": self.n,
            "eps": self.eps,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RecalibrationMap:
        """Inverse of :meth:`to_dict`."""
        if data.get("version") != 1 or data.get("method") not in METHODS:
            raise ValueError(
                f"data: expected a version 1 map with method in {METHODS}, "
                f"got version {data.get('version')!r} method {data.get('method')!r}"
            )
        x = np.asarray(data["x"], dtype=np.float64)
        y = np.asarray(data["y"], dtype=np.float64)
        x.setflags(write=False)
        y.setflags(write=False)
        return cls(
            str(data["method"]),
            tuple(float(v) for v in data["params"]),
            x,
            y,
            int(data["n"]),
            float(data["eps"]),
        )

    def knots(self, *, tolerance: float = KNOT_TOLERANCE) -> list[tuple[float, float]]:
        """A table ``[(p, q), ...]`` to apply by linear interpolation in logit space.

        Between knots, ``logit q`` is interpolated linearly in ``logit p``;
        beyond the end knots (``p`` outside ``[eps, 1 - eps]``) the end values
        hold. Knots start on a uniform logit grid (plus the isotonic knots) and
        midpoints are added until the table reproduces :meth:`apply` within
        ``tolerance / 4`` at every midpoint, so within ``tolerance`` on
        ``(1e-4, 1 - 1e-4)`` in practice (checked by the tests on a dense grid).
        """
        lo, hi = _logit(np.array([self.eps, 1.0 - self.eps]))
        z = np.linspace(lo, hi, 65)
        if self.method == "isotonic":
            z = np.union1d(z, _logit(np.clip(self.x, self.eps, 1.0 - self.eps)))
        for _ in range(30):
            lq = _logit(self.apply(expit(z)))
            mid = 0.5 * (z[1:] + z[:-1])
            approx = expit(0.5 * (lq[1:] + lq[:-1]))
            bad = np.abs(approx - self.apply(expit(mid))) > tolerance / 4
            if not bad.any():
                break
            z = np.sort(np.concatenate([z, mid[bad]]))
        q = self.apply(expit(z))
        return [(float(a), float(b)) for a, b in zip(expit(z), q, strict=True)]


def _check_fit_input(
    y_true: ArrayLike, y_prob: ArrayLike, sample_weight: ArrayLike | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    wa = np.ones_like(y) if w is None else w
    pos = float(np.dot(wa, y))
    if pos <= 0.0 or pos >= float(wa.sum()):
        raise Undefined("one_class_only", "a recalibration map needs both outcomes")
    return y, np.clip(p, EPS, 1.0 - EPS), wa


def fit_platt(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> RecalibrationMap:
    """Logistic recalibration on ``logit p`` (``p`` clipped at 1e-6), by maximum likelihood.

    Unlike Platt's original method no target smoothing is applied: the map
    recalibrates stored probabilities, not an SVM's scores.

    References
    ----------
    Platt (1999), "Probabilistic outputs for support vector machines...",
    Advances in Large Margin Classifiers; Cox (1958), Biometrika 45.
    """
    y, p, w = _check_fit_input(y_true, y_prob, sample_weight)
    fit = fit_logistic(np.column_stack([np.ones_like(p), _logit(p)]), y, sample_weight=w)
    return RecalibrationMap("platt", (float(fit.coef[0]), float(fit.coef[1])), n=y.shape[0])


def fit_beta(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> RecalibrationMap:
    """Beta calibration: logistic fit on the features ``ln p`` and ``-ln(1 - p)``.

    The map is monotone only if both coefficients are non-negative; a feature
    whose coefficient comes out negative is dropped (its coefficient set to
    0) and the rest refitted, until all are non-negative.

    References
    ----------
    Kull, Silva Filho & Flach, "Beta calibration: a well-founded and easily
    implemented improvement on logistic calibration for binary classifiers",
    AISTATS 2017 (PMLR 54), section 3; the repair rule is from memory of
    the authors' code.
    """
    y, p, w = _check_fit_input(y_true, y_prob, sample_weight)
    features = np.column_stack([np.log(p), -np.log1p(-p)])
    keep = [0, 1]
    coef = np.zeros(2)
    c = 0.0
    while True:
        design = np.column_stack([np.ones_like(p), features[:, keep]])
        fit = fit_logistic(design, y, sample_weight=w)
        coef = np.zeros(2)
        coef[keep] = fit.coef[1:]
        c = float(fit.coef[0])
        negative = [k for k in keep if coef[k] < 0]
        if not negative:
            break
        keep = [k for k in keep if k != negative[0]]
    return RecalibrationMap("beta", (float(coef[0]), float(coef[1]), c), n=y.shape[0])


def fit_isotonic(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> RecalibrationMap:
    """Isotonic (non-decreasing) regression of ``y`` on ``p``.

    Rows with equal ``p`` are pooled first, so ties never straddle a step; the
    map interpolates linearly between the fitted points (as scikit-learn's
    ``IsotonicRegression(out_of_bounds='clip')`` predicts) and is constant
    beyond the smallest and largest fitted ``p``.

    References
    ----------
    Zadrozny & Elkan, "Transforming classifier scores into accurate multiclass
    probability estimates", KDD 2002; Ayer et al., Ann. Math. Statist. 26
    (1955), for pool-adjacent-violators.
    """
    y, p, w = _check_fit_input(y_true, y_prob, sample_weight)
    ux, inv = np.unique(p, return_inverse=True)
    uw: FloatArray = np.bincount(inv, weights=w).astype(np.float64)
    keep = uw > 0
    uy: FloatArray = np.bincount(inv, weights=w * y)[keep] / uw[keep]
    ux, uw = ux[keep], uw[keep]
    fitted = pav_grouped(uy, uw)
    # Keep only the ends of each constant block: interpolation is unchanged.
    change = np.ones(fitted.shape[0], dtype=bool)
    change[1:-1] = (fitted[1:-1] != fitted[:-2]) | (fitted[1:-1] != fitted[2:])
    xs, ys = ux[change].copy(), fitted[change].copy()
    xs.setflags(write=False)
    ys.setflags(write=False)
    return RecalibrationMap("isotonic", (), xs, ys, n=y.shape[0])


_FITTERS = {"platt": fit_platt, "beta": fit_beta, "isotonic": fit_isotonic}


def fit_recalibration(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    method: str,
    *,
    sample_weight: ArrayLike | None = None,
) -> RecalibrationMap:
    """Fit the map named by ``method`` (``"platt"``, ``"beta"`` or ``"isotonic"``)."""
    if method not in _FITTERS:
        raise ValueError(f"method: expected one of {METHODS}, got {method!r}")
    return _FITTERS[method](y_true, y_prob, sample_weight=sample_weight)


@dataclass(frozen=True)
class GainEstimate:
    """Out-of-fold log-loss gain ``mean(l(p) - l(q_oof))`` (nats; positive = better).

    ``low``/``high`` are ``mean -/+ 1.96 se`` with the paired standard error
    ``sd(d)/sqrt(n)``; ``in_sample`` is the optimistic gain of the map fitted
    and scored on all rows.
    """

    mean: float
    se: float
    low: float
    high: float
    in_sample: float
    n: int
    n_folds: int
    method: str


def _log_loss_rows(y: FloatArray, q: FloatArray) -> FloatArray:
    q = np.clip(q, EPS, 1.0 - EPS)
    out: FloatArray = -(y * np.log(q) + (1.0 - y) * np.log1p(-q))
    return out


def cross_fitted_gain(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    method: str,
    *,
    n_folds: int = 5,
    seed: int = 0,
) -> GainEstimate:
    """Honest log-loss gain of a recalibration map by K-fold cross-fitting.

    Rows are split at random (``numpy.random.default_rng(seed)``) into
    ``n_folds`` folds; each fold is scored with the map fitted on the others.
    Both losses clip probabilities at 1e-6. If outcomes cluster in time, a
    temporal hold-out or block bootstrap is the better choice (METHODS.md §10).

    Raises
    ------
    Undefined
        ``"one_class_only"`` when the data or a training fold has one outcome
        only, or ``"no_mle"`` from a separated logistic fit.
    """
    y, p, _ = check_binary_pair(y_true, y_prob)
    if method not in _FITTERS:
        raise ValueError(f"method: expected one of {METHODS}, got {method!r}")
    n_folds = check_positive_int(n_folds, "n_folds", 2)
    n = y.shape[0]
    if n < 2 * n_folds:
        raise Undefined("too_few_rows", f"{n} rows for {n_folds} folds")
    fold = np.empty(n, dtype=np.intp)
    fold[np.random.default_rng(seed).permutation(n)] = np.arange(n) % n_folds
    q_oof = np.empty(n)
    for k in range(n_folds):
        test = fold == k
        q_oof[test] = fit_recalibration(y[~test], p[~test], method).apply(p[test])
    base = _log_loss_rows(y, p)
    d = base - _log_loss_rows(y, q_oof)
    mean = float(d.mean())
    se = float(d.std(ddof=1) / math.sqrt(n))
    in_sample = float(np.mean(base - _log_loss_rows(y, fit_recalibration(y, p, method).apply(p))))
    return GainEstimate(mean, se, mean - 1.96 * se, mean + 1.96 * se, in_sample, n, n_folds, method)


@dataclass(frozen=True)
class TemperatureMap:
    """Temperature scaling ``q_k ∝ p_k^(1/T)``; ``nll_*`` are mean log losses (nats)."""

    temperature: float
    nll_before: float
    nll_after: float
    n: int
    eps: float = 1e-12

    def apply(self, y_prob: ArrayLike) -> FloatArray:
        """Rescaled probability rows (argmax is preserved)."""
        p = np.asarray(y_prob, dtype=np.float64)
        scaled = np.log(np.clip(p, self.eps, 1.0)) / self.temperature
        out: FloatArray = np.exp(log_softmax(scaled, axis=1))
        return out


def fit_temperature(
    y_true: ArrayLike, y_prob: ArrayLike, *, bounds: tuple[float, float] = (0.05, 20.0)
) -> TemperatureMap:
    """Fit a temperature by minimising the mean log loss (bounded scalar search).

    ``y_true`` holds class indices ``0..K-1``; ``y_prob`` is ``(n, K)``. The
    stored probabilities play the role of logits via ``z = ln p`` (clipped at
    1e-12).

    References
    ----------
    Guo, Pleiss, Sun & Weinberger, "On calibration of modern neural networks",
    ICML 2017, section 4.2; METHODS.md §10.
    """
    p = np.asarray(y_prob, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] < 2 or p.shape[0] == 0:
        raise ValueError(f"y_prob: expected a non-empty (n, K >= 2) array, got shape {p.shape}")
    if not ((p >= 0) & (p <= 1)).all():
        raise ValueError("y_prob: expected probabilities in [0, 1], got others (or NaN)")
    y = np.asarray(y_true)
    if y.shape != (p.shape[0],) or y.dtype.kind not in "iu" or y.min() < 0 or y.max() >= p.shape[1]:
        raise ValueError(
            f"y_true: expected {p.shape[0]} class indices in 0..{p.shape[1] - 1}, got {y[:5]!r}"
        )
    if not 0 < bounds[0] < bounds[1]:
        raise ValueError(f"bounds: expected 0 < low < high, got {bounds!r}")
    log_p = np.log(np.clip(p, 1e-12, 1.0))
    rows = np.arange(p.shape[0])

    def nll(t: float) -> float:
        return float(-np.mean(log_softmax(log_p / t, axis=1)[rows, y]))

    res = optimize.minimize_scalar(nll, bounds=bounds, method="bounded")
    t_hat = float(res.x)
    return TemperatureMap(t_hat, nll(1.0), nll(t_hat), p.shape[0])


__all__ = [
    "METHODS",
    "GainEstimate",
    "RecalibrationMap",
    "TemperatureMap",
    "cross_fitted_gain",
    "fit_beta",
    "fit_isotonic",
    "fit_platt",
    "fit_recalibration",
    "fit_temperature",
]
