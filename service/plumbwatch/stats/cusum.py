"""Risk-adjusted Bernoulli CUSUM charts (odds-ratio shift).

Each chart tests the model's probabilities against ``q = sigmoid(logit p +
ln R_A)``: ``R_A > 1`` looks for under-prediction, ``R_A < 1`` for
over-prediction. The chart value is ``W_t = max(0, W_{t-1} + w_t)`` with the
weight ``w_t = y_t ln R_A - ln(1 - p_t + R_A p_t)`` (METHODS.md §8), and it
signals when ``W_t >= h``. Unlike the e-processes in
:mod:`plumbwatch.stats.evidence` a CUSUM is not anytime-valid; it controls
the false-alarm *rate* through the in-control average run length ARL0, which
guarantees ``ARL0 >= e^h`` and is set more sharply by simulation
(:func:`cusum_threshold_by_simulation`).

References
----------
Page, "Continuous inspection schemes", Biometrika 41 (1954).
Steiner, Cook, Farewell & Treasure, "Monitoring surgical performance using
risk-adjusted cumulative sum charts", Biostatistics 1(4):441-452 (2000).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plumbwatch.stats._validate import check_binary_pair, check_positive_int, check_probabilities

FloatArray = NDArray[np.float64]
DEFAULT_ODDS_RATIOS = (2.0, 0.5)
_CHUNK = 65_536  # rows per step of a long batch


def cusum_weights(y_true: ArrayLike, y_prob: ArrayLike, r_a: ArrayLike) -> FloatArray:
    """Per-row CUSUM weights, shape ``(n_rows, n_charts)``; inputs assumed validated.

    The weight is the log likelihood ratio of an odds shift by ``R_A``
    against ``p`` (Steiner et al. 2000 with ``R_0 = 1``). No clipping is
    needed: ``1 - p + R_A p > 0`` for every ``p`` in [0, 1].
    """
    y = np.asarray(y_true, dtype=np.float64)[:, None]
    p = np.asarray(y_prob, dtype=np.float64)[:, None]
    r = np.asarray(r_a, dtype=np.float64)[None, :]
    out: FloatArray = y * np.log(r) - np.log(1.0 - p + r * p)
    return out


def _lindley(start: FloatArray, w: FloatArray) -> FloatArray:
    """``W_t = max(0, W_{t-1} + w_t)`` along axis 0, vectorised.

    With ``S_t = W_0 + sum_{s<=t} w_s`` the recursion solves to
    ``W_t = S_t - min(0, min_{1<=k<=t} S_k)``.
    """
    s = start[None, :] + np.cumsum(w, axis=0)
    out: FloatArray = s - np.minimum(0.0, np.minimum.accumulate(s, axis=0))
    return out


@dataclass(frozen=True)
class RiskAdjustedCusum:
    """State of one CUSUM chart per odds ratio ``r_a``; immutable.

    Examples
    --------
    >>> c = RiskAdjustedCusum.start().update([1], [0.2])
    >>> [round(v, 6) for v in c.statistic]
    [0.510826, 0.0]
    """

    r_a: tuple[float, ...] = DEFAULT_ODDS_RATIOS
    statistic: tuple[float, ...] = (0.0, 0.0)
    n: int = 0
    max_statistic: tuple[float, ...] = (0.0, 0.0)

    @classmethod
    def start(cls, r_a: ArrayLike = DEFAULT_ODDS_RATIOS) -> RiskAdjustedCusum:
        """Fresh charts (all zero) for the given odds ratios."""
        r = tuple(float(v) for v in np.asarray(r_a, dtype=np.float64).reshape(-1))
        if not r or not all(math.isfinite(v) and v > 0 and v != 1.0 for v in r):
            raise ValueError(f"r_a: expected positive odds ratios other than 1, got {r!r}")
        zeros = (0.0,) * len(r)
        return cls(r_a=r, statistic=zeros, n=0, max_statistic=zeros)

    def update_with_path(
        self, y_true: ArrayLike, y_prob: ArrayLike
    ) -> tuple[RiskAdjustedCusum, FloatArray]:
        """Process a batch in order; also return ``W_t`` per row and chart."""
        y, p, _ = check_binary_pair(y_true, y_prob)
        if y.shape[0] == 0:
            return self, np.empty((0, len(self.r_a)))
        path = _lindley(np.asarray(self.statistic), cusum_weights(y, p, self.r_a))
        return self._after(path[-1], path.max(axis=0), y.shape[0]), path

    def update_with_weights(self, weights: ArrayLike) -> RiskAdjustedCusum:
        """Process a batch given its rows' weights in order, shape ``(n_rows, n_charts)``
        (:func:`cusum_weights` for these charts' ``r_a``). For callers that feed the
        same rows to many charts and compute the weights once; the path is walked in
        chunks and not kept, so millions of rows cost little memory."""
        w = np.asarray(weights, dtype=np.float64)
        if w.shape[0] == 0:
            return self
        if w.ndim != 2 or w.shape[1] != len(self.r_a):
            raise ValueError(f"weights: expected shape (n, {len(self.r_a)}), got {w.shape}")
        last, top = np.asarray(self.statistic), np.asarray(self.max_statistic)
        for start in range(0, w.shape[0], _CHUNK):
            path = _lindley(last, w[start : start + _CHUNK])
            last, top = path[-1], np.maximum(top, path.max(axis=0))
        return self._after(last, top, w.shape[0])

    def _after(self, last: FloatArray, top: FloatArray, rows: int) -> RiskAdjustedCusum:
        return RiskAdjustedCusum(
            r_a=self.r_a,
            statistic=tuple(float(v) for v in last),
            n=self.n + rows,
            max_statistic=tuple(
                float(max(m, v)) for m, v in zip(self.max_statistic, top, strict=True)
            ),
        )

    def update(self, y_true: ArrayLike, y_prob: ArrayLike) -> RiskAdjustedCusum:
        """Process a batch in the given (maturity) order and return the new state."""
        return self.update_with_path(y_true, y_prob)[0]

    def signalled(self, h: float) -> tuple[bool, ...]:
        """Per chart, whether ``W_t >= h`` has happened since the start."""
        return tuple(m >= h for m in self.max_statistic)

    def to_dict(self) -> dict[str, object]:
        """A JSON-able dict."""
        return {
            "version": 1,
            "r_a": list(self.r_a),
            "statistic": list(self.statistic),
            "n": self.n,
            "max_statistic": list(self.max_statistic),
        }

    @classmethod
    def from_dict(cls, data: dict[str, object]) -> RiskAdjustedCusum:
        """Inverse of :meth:`to_dict`."""
        if data.get("version") != 1:
            raise ValueError(f"data: expected version 1, got {data.get('version')!r}")
        r_a, stat, mx = (data[k] for k in ("r_a", "statistic", "max_statistic"))
        assert isinstance(r_a, list) and isinstance(stat, list) and isinstance(mx, list)
        if not len(r_a) == len(stat) == len(mx):
            raise ValueError("data: expected r_a, statistic and max_statistic of equal length")
        n = data["n"]
        assert isinstance(n, int)
        return cls(
            r_a=tuple(float(v) for v in r_a),
            statistic=tuple(float(v) for v in stat),
            n=n,
            max_statistic=tuple(float(v) for v in mx),
        )


@dataclass(frozen=True)
class CusumThreshold:
    """A simulated CUSUM threshold.

    ``h`` is the smallest value on the search grid whose simulated ARL0
    reaches the target; ``arl0`` is the simulated mean run length at that
    ``h`` (runs still going after ``max_run`` rows count as ``max_run``, so
    it is a lower estimate when ``censored > 0``); ``arl0_se`` its standard
    error over ``n_sims`` runs.
    """

    h: float
    arl0: float
    arl0_se: float
    target_arl0: float
    r_a: float
    n_sims: int
    censored: int


def cusum_threshold_by_simulation(
    y_prob_sample: ArrayLike,
    *,
    target_arl0: float,
    r_a: float = 2.0,
    n_sims: int = 500,
    seed: int = 0,
    max_run: int | None = None,
    n_grid: int = 400,
) -> CusumThreshold:
    """Set a CUSUM threshold ``h`` so that the in-control ARL0 is about ``target_arl0``.

    Each simulated run resamples ``p`` with replacement from ``y_prob_sample``
    (matured data of the segment) and draws ``y ~ Bernoulli(p)``, so the run
    is in control by construction (METHODS.md §8). All runs share the same
    random numbers across candidate thresholds, so ARL0 is monotone in ``h``
    on the grid ``(0, ln target_arl0]``; ``ARL0 >= e^h`` means the answer
    lies in that interval.

    Parameters
    ----------
    y_prob_sample : array of shape (n,)
        Probabilities to resample from.
    target_arl0 : float
        Desired mean number of in-control rows before a false signal, > 1.
    r_a : float
        Odds ratio the chart is tuned to.
    n_sims : int
        Number of simulated runs; the standard error of ARL0 is about
        ``ARL0 / sqrt(n_sims)``.
    seed : int
        Seed for ``numpy.random.default_rng``.
    max_run : int, optional
        Length at which runs are censored; default ``20 * target_arl0``.
    n_grid : int
        Number of candidate thresholds.

    References
    ----------
    Steiner et al. (2000), section 3, set thresholds by simulated ARL.
    """
    pool = check_probabilities(y_prob_sample, "y_prob_sample")
    if pool.shape[0] == 0:
        raise ValueError("y_prob_sample: expected at least one probability, got none")
    if not (math.isfinite(target_arl0) and target_arl0 > 1.0):
        raise ValueError(f"target_arl0: expected a finite value > 1, got {target_arl0!r}")
    if not (math.isfinite(r_a) and r_a > 0 and r_a != 1.0):
        raise ValueError(f"r_a: expected a positive odds ratio other than 1, got {r_a!r}")
    n_sims = check_positive_int(n_sims, "n_sims", 2)
    n_grid = check_positive_int(n_grid, "n_grid", 2)
    cap = math.ceil(20 * target_arl0) if max_run is None else check_positive_int(max_run, "max_run")
    hs = np.linspace(0.0, math.log(target_arl0), n_grid + 1)[1:]
    rng = np.random.default_rng(seed)
    first = np.full((n_sims, n_grid), cap, dtype=np.int64)  # run length per (run, h)
    done = np.zeros((n_sims, n_grid), dtype=bool)
    w_now = np.zeros(n_sims)
    run_max = np.zeros(n_sims)
    chunk = 2048
    t0 = 0
    ln_r = math.log(r_a)
    while t0 < cap and not done.all():
        c = min(chunk, cap - t0)
        p = pool[rng.integers(0, pool.shape[0], size=(c, n_sims))]
        y = rng.random((c, n_sims)) < p
        w = np.where(y, ln_r, 0.0) - np.log(1.0 - p + r_a * p)
        path = _lindley(w_now, w)  # (c, n_sims)
        w_now = path[-1]
        # Running max per run is non-decreasing, so the first crossing of h is
        # the number of rows whose running max is still below h.
        rm = np.maximum(np.maximum.accumulate(path, axis=0), run_max[None, :])
        run_max = rm[-1]
        newly = (~done) & (run_max[:, None] >= hs[None, :])
        for i in np.flatnonzero(newly.any(axis=1)):
            js = np.flatnonzero(newly[i])
            first[i, js] = t0 + np.searchsorted(rm[:, i], hs[js], side="left") + 1
            done[i, js] = True
        t0 += c
    arl = first.mean(axis=0)
    ok = np.flatnonzero(arl >= target_arl0)
    j = int(ok[0]) if ok.size else n_grid - 1
    return CusumThreshold(
        h=float(hs[j]),
        arl0=float(arl[j]),
        arl0_se=float(first[:, j].std(ddof=1) / math.sqrt(n_sims)),
        target_arl0=float(target_arl0),
        r_a=float(r_a),
        n_sims=n_sims,
        censored=int((~done[:, j]).sum()),
    )


__all__ = [
    "DEFAULT_ODDS_RATIOS",
    "CusumThreshold",
    "RiskAdjustedCusum",
    "cusum_threshold_by_simulation",
    "cusum_weights",
]
