"""Weighted logistic regression by Newton's method (IRLS).

One generic fitter serves the Cox recalibration fits, calibration-in-the-large
and any binned fit: ``X`` already holds the intercept column if one is wanted,
``y`` may be fractional in [0, 1] (a bin's event rate, with the bin's count as
weight), and an ``offset`` enters the linear predictor with coefficient 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import expit

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_positive_int, check_weights

FloatArray = NDArray[np.float64]

# Under (quasi-)separation Newton drives coefficients towards infinity. A fitted
# probability near 0 or 1 alone is no sign of it (confident forecasts on the logit
# scale legitimately reach |eta| > 36), so the test is on the coefficients: none of
# the fits here (intercept, slope on logit p, beta-calibration terms) has a finite
# MLE anywhere near this size.
_COEF_LIMIT = 50.0


@dataclass(frozen=True)
class LogisticFit:
    """Result of :func:`fit_logistic`.

    Attributes
    ----------
    coef : ndarray
        Maximum-likelihood coefficients, one per column of ``X``.
    cov : ndarray
        Inverse Fisher information at ``coef`` (model-based covariance).
    loglik : float
        ``Σ w [y η − log(1 + e^η)]`` at the optimum (the binomial
        log-likelihood; for fractional ``y`` the quasi-log-likelihood).
    n_iter : int
        Newton steps taken.
    converged : bool
        Always True for a returned fit (failures raise ``Undefined``).
    """

    coef: FloatArray
    cov: FloatArray
    loglik: float
    n_iter: int
    converged: bool

    @property
    def se(self) -> FloatArray:
        """Standard errors, ``sqrt(diag(cov))``."""
        return np.sqrt(np.diag(self.cov))


def _loglik(eta: FloatArray, y: FloatArray, w: FloatArray) -> float:
    return float(np.sum(w * (y * eta - np.logaddexp(0.0, eta))))


def fit_logistic(
    X: ArrayLike,
    y: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
    offset: ArrayLike | None = None,
    max_iter: int = 50,
    tol: float = 1e-10,
    start: ArrayLike | None = None,
) -> LogisticFit:
    """Maximum-likelihood logistic regression ``logit P(y=1) = offset + X β``.

    Parameters
    ----------
    X : array of shape (n, k)
        Design matrix, including an intercept column if wanted.
    y : array of shape (n,)
        Outcomes or event fractions in [0, 1].
    sample_weight : array of shape (n,), optional
        Non-negative case weights (e.g. bin counts).
    offset : array of shape (n,), optional
        Known term added to the linear predictor.
    max_iter : int
        Newton steps allowed.
    tol : float
        Convergence when the largest coefficient change is below
        ``tol * max(1, max|β|)``.
    start : array of shape (k,), optional
        Starting coefficients (zeros by default); a good start saves steps.

    Returns
    -------
    LogisticFit

    Raises
    ------
    ValueError
        Bad shapes, values or options.
    Undefined
        ``"no_mle"`` when the data are separated, all outcomes equal, the
        information matrix is singular, or Newton does not converge.

    References
    ----------
    McCullagh, P. & Nelder, J. A. (1989). *Generalized Linear Models*, 2nd ed.,
    §2.5 (iteratively reweighted least squares) and §4.4 (binary data).

    Examples
    --------
    >>> import numpy as np
    >>> X = np.column_stack([np.ones(4), [0.0, 1.0, 2.0, 3.0]])
    >>> fit = fit_logistic(X, [0, 1, 0, 1])
    >>> bool(fit.converged)
    True
    """
    Xa = np.asarray(X, dtype=np.float64)
    if Xa.ndim != 2:
        raise ValueError(f"X: expected a 2-D array, got shape {Xa.shape}")
    n, k = Xa.shape
    ya = np.asarray(y, dtype=np.float64)
    if ya.shape != (n,):
        raise ValueError(f"y: expected shape ({n},), got {ya.shape}")
    if not ((ya >= 0.0) & (ya <= 1.0)).all():
        raise ValueError("y: expected values in [0, 1], got others (or NaN)")
    if not np.isfinite(Xa).all():
        raise ValueError("X: expected finite values, got NaN or infinity")
    w = check_weights(sample_weight, n)
    wa = np.ones(n) if w is None else w
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64)
    if off.shape != (n,) or not np.isfinite(off).all():
        raise ValueError(f"offset: expected {n} finite values, got shape {off.shape}")
    max_iter = check_positive_int(max_iter, "max_iter")

    total = wa.sum()
    events = float(np.dot(wa, ya))
    if total <= 0.0:
        raise Undefined("no_mle", "all weights are zero")
    if events <= 0.0 or events >= total:
        raise Undefined("no_mle", "all outcomes are equal; the MLE is at infinity")

    beta = np.zeros(k) if start is None else np.array(start, dtype=np.float64)
    if beta.shape != (k,):
        raise ValueError(f"start: expected shape ({k},), got {beta.shape}")
    eta = off + Xa @ beta
    ll = _loglik(eta, ya, wa)
    n_iter = 0
    for _ in range(max_iter):
        n_iter += 1
        mu = expit(eta)
        info = (Xa * (wa * mu * (1.0 - mu))[:, None]).T @ Xa
        grad = Xa.T @ (wa * (ya - mu))
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError as exc:
            raise Undefined("no_mle", "the information matrix is singular") from exc
        # Step halving keeps the likelihood from decreasing far from the optimum.
        t = 1.0
        for _ in range(30):
            cand = beta + t * step
            eta_c = off + Xa @ cand
            ll_c = _loglik(eta_c, ya, wa)
            if ll_c >= ll - 1e-12 * max(1.0, abs(ll)):
                break
            t *= 0.5
        beta, eta, ll = cand, eta_c, ll_c
        if np.max(np.abs(t * step)) <= tol * max(1.0, float(np.max(np.abs(beta)))):
            break
    else:
        raise Undefined("no_mle", f"Newton did not converge in {max_iter} steps (separation?)")

    if np.max(np.abs(beta)) > _COEF_LIMIT:
        raise Undefined("no_mle", "coefficients diverge: the data are (quasi-)separated")
    mu = expit(eta)
    info = (Xa * (wa * mu * (1.0 - mu))[:, None]).T @ Xa
    cond = np.linalg.cond(info)
    if not np.isfinite(cond) or cond > 1e14:
        raise Undefined("no_mle", "the information matrix is singular")
    return LogisticFit(coef=beta, cov=np.linalg.inv(info), loglik=ll, n_iter=n_iter, converged=True)
