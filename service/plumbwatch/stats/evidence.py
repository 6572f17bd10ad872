"""Anytime-valid evidence against calibration: mixture e-processes.

A state holds, for each alternative j on a fixed grid, the summed log
likelihood ratio ``L_j`` of the alternative against the model's own
probabilities. The mixture ``E = sum_j w_j exp(L_j)`` is a test martingale
under sequential calibration (METHODS.md §7.1), so by Ville's inequality
``P(sup_t E_t >= 1/alpha) <= alpha`` however often it is looked at.

Rows must be fed in *maturity order* (METHODS.md §7.5): an order that depends
on outcomes not yet processed (label arrival, for instance) breaks validity.
States are immutable; ``update`` returns a new one.

Two alternative families share one state layout:

* :class:`MixtureEvidence` (binary): ``q = sigmoid(a + b * logit p)`` on an
  (intercept, slope) grid, METHODS.md §7.2 Algorithm A.
* :class:`TemperatureEvidence` (multiclass): ``q_k ∝ p_k ** (1/T)`` on a
  temperature grid, METHODS.md §7.2 "Multiclass extension".

The risk-adjusted CUSUM (METHODS.md §8) lives in :mod:`plumbwatch.stats.cusum`
and is re-exported here.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass
from typing import Any, ClassVar, TypeVar

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import logsumexp

from plumbwatch.stats._validate import check_binary_pair
from plumbwatch.stats.cusum import (
    CusumThreshold,
    RiskAdjustedCusum,
    cusum_threshold_by_simulation,
    cusum_weights,
)

FloatArray = NDArray[np.float64]

EPS = 1e-6
DEFAULT_INTERCEPTS = (-0.5, -0.25, 0.0, 0.25, 0.5)
DEFAULT_SLOPES = (0.6, 0.8, 1.0, 1.25, 1.5)
DEFAULT_TEMPERATURES = (0.7, 0.85, 1.0, 1.2, 1.5)

# Rows are processed in chunks so that a 10-million-row backfill does not
# allocate a (rows x alternatives) matrix at once.
_CHUNK = 65_536
_MAGIC = b"PWEV"
_VERSION = 1
_KIND_CODE = {"binary": 1, "temperature": 2}
_HEADER = struct.Struct("<4sBBHqdd")  # magic, version, kind, J, n, max log E, eps

S = TypeVar("S", bound="_EvidenceState")


def _row_logsumexp(x: FloatArray) -> FloatArray:
    # scipy's logsumexp handles signs, weights and infinities we never have;
    # this plain version is about three times faster on (rows x 25).
    m = x.max(axis=1)
    out: FloatArray = m + np.log(np.exp(x - m[:, None]).sum(axis=1))
    return out


def _frozen(a: ArrayLike) -> FloatArray:
    out = np.array(a, dtype=np.float64)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class _EvidenceState:
    """Shared layout: parameters per alternative, log weights, summed log LRs."""

    params: FloatArray  # (J, d): the alternative's parameters
    log_weights: FloatArray  # (J,), logsumexp == 0
    log_lr: FloatArray  # (J,), summed log likelihood ratios
    n: int = 0
    max_log_evidence: float = 0.0  # running max of log E, including E_0 = 1
    eps: float = EPS
    kind: ClassVar[str] = ""
    n_params: ClassVar[int] = 1

    # -- what callers read -------------------------------------------------
    @property
    def log_evidence(self) -> float:
        """Natural log of the current mixture e-value ``E_n``."""
        return float(_row_logsumexp((self.log_weights + self.log_lr)[None, :])[0])

    @property
    def p_value(self) -> float:
        """Anytime-valid p-value ``min(1, 1 / max_{s<=n} E_s)`` (METHODS.md §7.1)."""
        return float(min(1.0, math.exp(-self.max_log_evidence)))

    def crossed(self, alpha: float) -> bool:
        """Whether ``max_s E_s >= 1/alpha`` has happened (Ville's inequality)."""
        if not 0.0 < alpha < 1.0:
            raise ValueError(f"alpha: expected a value in (0, 1), got {alpha!r}")
        return self.max_log_evidence >= math.log(1.0 / alpha)

    # -- updates -----------------------------------------------------------
    def _row_log_lr(self, y_true: ArrayLike, y_prob: ArrayLike) -> FloatArray:
        raise NotImplementedError

    def _check_batch(self, y_true: ArrayLike, y_prob: ArrayLike) -> tuple[Any, Any]:
        raise NotImplementedError

    def update_with_path(self: S, y_true: ArrayLike, y_prob: ArrayLike) -> tuple[S, FloatArray]:
        """Process a batch in the given order; also return ``log E`` after each row."""
        y, p = self._check_batch(y_true, y_prob)
        n_rows = y.shape[0]
        path = np.empty(n_rows, dtype=np.float64)
        acc = self.log_lr.copy()
        for start in range(0, n_rows, _CHUNK):
            stop = min(n_rows, start + _CHUNK)
            cum = np.cumsum(self._row_log_lr(y[start:stop], p[start:stop]), axis=0)
            cum += acc
            path[start:stop] = _row_logsumexp(cum + self.log_weights)
            acc = cum[-1]
        new_max = max(self.max_log_evidence, float(path.max())) if n_rows else self.max_log_evidence
        state = type(self)(
            params=self.params,
            log_weights=self.log_weights,
            log_lr=_frozen(acc),
            n=self.n + n_rows,
            max_log_evidence=new_max,
            eps=self.eps,
        )
        return state, path

    def update(self: S, y_true: ArrayLike, y_prob: ArrayLike) -> S:
        """Process a batch in the given (maturity) order and return the new state."""
        return self.update_with_path(y_true, y_prob)[0]

    # -- serialisation -----------------------------------------------------
    def to_bytes(self) -> bytes:
        """Compact little-endian encoding: a versioned header, then float64 arrays."""
        j = self.log_lr.shape[0]
        head = _HEADER.pack(
            _MAGIC, _VERSION, _KIND_CODE[self.kind], j, self.n, self.max_log_evidence, self.eps
        )
        body = np.concatenate([self.params.ravel(), self.log_weights, self.log_lr])
        return head + body.astype("<f8").tobytes()

    @classmethod
    def from_bytes(cls: type[S], data: bytes) -> S:
        """Inverse of :meth:`to_bytes`; rejects other kinds and versions."""
        if len(data) < _HEADER.size:
            raise ValueError(f"data: expected at least {_HEADER.size} bytes, got {len(data)}")
        magic, version, kind, j, n, max_log_e, eps = _HEADER.unpack_from(data)
        if magic != _MAGIC or version != _VERSION:
            raise ValueError(f"data: expected an evidence state version {_VERSION}, got {magic!r}")
        if kind != _KIND_CODE[cls.kind]:
            raise ValueError(f"data: expected kind code {_KIND_CODE[cls.kind]}, got {kind}")
        body = np.frombuffer(data, dtype="<f8", offset=_HEADER.size)
        d = cls.n_params
        if body.shape[0] != j * (d + 2):
            raise ValueError(f"data: expected {j * (d + 2)} values, got {body.shape[0]}")
        return cls(
            params=_frozen(body[: j * d].reshape(j, d)),
            log_weights=_frozen(body[j * d : j * (d + 1)]),
            log_lr=_frozen(body[j * (d + 1) :]),
            n=int(n),
            max_log_evidence=float(max_log_e),
            eps=float(eps),
        )

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able dict (floats round-trip exactly through ``repr``)."""
        return {
            "kind": self.kind,
            "version": _VERSION,
            "params": self.params.tolist(),
            "log_weights": self.log_weights.tolist(),
            "log_lr": self.log_lr.tolist(),
            "n": self.n,
            "max_log_evidence": self.max_log_evidence,
            "eps": self.eps,
        }

    @classmethod
    def from_dict(cls: type[S], data: dict[str, Any]) -> S:
        """Inverse of :meth:`to_dict`."""
        if data.get("kind") != cls.kind or data.get("version") != _VERSION:
            raise ValueError(
                f"data: expected kind {cls.kind!r} version {_VERSION}, "
                f"got {data.get('kind')!r} version {data.get('version')!r}"
            )
        return cls(
            params=_frozen(np.asarray(data["params"], dtype=np.float64).reshape(-1, cls.n_params)),
            log_weights=_frozen(data["log_weights"]),
            log_lr=_frozen(data["log_lr"]),
            n=int(data["n"]),
            max_log_evidence=float(data["max_log_evidence"]),
            eps=float(data["eps"]),
        )

    def __eq__(self, other: object) -> bool:
        if type(other) is not type(self):
            return NotImplemented
        assert isinstance(other, _EvidenceState)
        return (
            self.n == other.n
            and self.max_log_evidence == other.max_log_evidence
            and self.eps == other.eps
            and np.array_equal(self.params, other.params)
            and np.array_equal(self.log_weights, other.log_weights)
            and np.array_equal(self.log_lr, other.log_lr)
        )

    __hash__ = None  # type: ignore[assignment]


def _log_weights(weights: ArrayLike | None, j: int) -> FloatArray:
    if weights is None:
        return _frozen(np.full(j, -math.log(j)))
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (j,) or not (np.isfinite(w) & (w > 0)).all():
        raise ValueError(f"weights: expected {j} positive finite values, got {w!r}")
    # A mixture is a martingale only if the weights sum to one.
    return _frozen(np.log(w) - math.log(float(w.sum())))


def _check_binary_batch(y_true: ArrayLike, y_prob: ArrayLike) -> tuple[FloatArray, FloatArray]:
    y, p, _ = check_binary_pair(y_true, y_prob)
    return y, p


@dataclass(frozen=True, eq=False)
class MixtureEvidence(_EvidenceState):
    """Binary mixture e-process over logistic recalibration alternatives.

    Each alternative j is ``q = sigmoid(a_j + b_j * logit p)``; ``params`` has
    rows ``(a_j, b_j)``. Start one with :meth:`start`.

    References
    ----------
    METHODS.md §7.2 (Algorithm A), which also gives the check values.
    Ville (1939) for the maximal inequality; Ramdas, Grünwald, Vovk & Shafer,
    "Game-theoretic statistics and safe anytime-valid inference", Statistical
    Science (2023), for e-processes in general.

    Examples
    --------
    >>> s = MixtureEvidence.start().update([1, 0, 1, 1, 0], [0.2, 0.7, 0.5, 0.9, 0.1])
    >>> round(s.log_evidence, 6)
    -0.056404
    """

    kind: ClassVar[str] = "binary"
    n_params: ClassVar[int] = 2

    @classmethod
    def start(
        cls,
        intercepts: ArrayLike = DEFAULT_INTERCEPTS,
        slopes: ArrayLike = DEFAULT_SLOPES,
        *,
        weights: ArrayLike | None = None,
        eps: float = EPS,
    ) -> MixtureEvidence:
        """A fresh state (E = 1) on the grid ``intercepts x slopes``.

        ``weights`` (one per grid point, intercept-major order) are normalised
        to sum to one; the default is uniform.
        """
        a = np.asarray(intercepts, dtype=np.float64).reshape(-1)
        b = np.asarray(slopes, dtype=np.float64).reshape(-1)
        if a.size == 0 or b.size == 0 or not (np.isfinite(a).all() and np.isfinite(b).all()):
            raise ValueError("intercepts and slopes: expected non-empty finite grids")
        if not 0.0 < eps < 0.5:
            raise ValueError(f"eps: expected a value in (0, 0.5), got {eps!r}")
        aa, bb = np.meshgrid(a, b, indexing="ij")
        params = np.column_stack([aa.ravel(), bb.ravel()])
        j = params.shape[0]
        return cls(
            params=_frozen(params),
            log_weights=_log_weights(weights, j),
            log_lr=_frozen(np.zeros(j)),
            eps=float(eps),
        )

    def _check_batch(self, y_true: ArrayLike, y_prob: ArrayLike) -> tuple[Any, Any]:
        return _check_binary_batch(y_true, y_prob)

    def _row_log_lr(self, y_true: ArrayLike, y_prob: ArrayLike) -> FloatArray:
        return binary_log_lr(y_true, y_prob, self.params[:, 0], self.params[:, 1], eps=self.eps)


def binary_log_lr(
    y_true: ArrayLike, y_prob: ArrayLike, a: ArrayLike, b: ArrayLike, *, eps: float = EPS
) -> FloatArray:
    """Per-row log LR of ``Bernoulli(sigmoid(a + b logit p))`` against ``Bernoulli(p)``.

    Returns an array of shape ``(n_rows, n_alternatives)``. Inputs are assumed
    validated. ``p`` is clipped to ``[eps, 1 - eps]`` so that one event the
    model called impossible cannot dominate (METHODS.md global policy).
    """
    y = np.asarray(y_true, dtype=np.float64)[:, None]
    p = np.clip(np.asarray(y_prob, dtype=np.float64), eps, 1.0 - eps)[:, None]
    log_p, log_1mp = np.log(p), np.log1p(-p)
    eta = np.asarray(a, dtype=np.float64)[None, :] + np.asarray(b, dtype=np.float64)[None, :] * (
        log_p - log_1mp
    )
    # log q = -softplus(-eta) for y = 1 and log(1 - q) = -softplus(eta) for y = 0:
    # one softplus per cell with the sign of the outcome, half the work of both.
    sign = 2.0 * y - 1.0
    out: FloatArray = -np.logaddexp(0.0, -sign * eta) - np.where(y == 1.0, log_p, log_1mp)
    return out


def binary_log_lr_sums(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    groups: ArrayLike,
    n_groups: int,
    a: ArrayLike,
    b: ArrayLike,
    *,
    eps: float = EPS,
) -> FloatArray:
    """The rows' :func:`binary_log_lr` summed per group, shape ``(n_groups, n_alternatives)``.

    ``groups`` holds each row's group in ``[0, n_groups)``. The same sums as
    ``binary_log_lr(...)`` added up row by row (to rounding), for far less work on
    millions of rows: only sums are wanted, so rows are split by outcome, which fixes
    the sign of the softplus argument, and ``softplus(±(a + b z)) =
    log1p(e^(±a) e^(±b z))`` takes one exponential per distinct slope instead of one
    per alternative. Where the exponentials could overflow (a grid far wider than
    the default) the direct form is used.
    """
    y = np.asarray(y_true).reshape(-1)
    p = np.clip(np.asarray(y_prob, dtype=np.float64).reshape(-1), eps, 1.0 - eps)
    g = np.asarray(groups, dtype=np.int64).reshape(-1)
    a_ = np.asarray(a, dtype=np.float64).reshape(-1)
    b_ = np.asarray(b, dtype=np.float64).reshape(-1)
    out = np.zeros((n_groups, a_.size))
    z_max = math.log((1.0 - eps) / eps)
    if not a_.size or float(np.abs(a_).max() + np.abs(b_).max() * z_max) > 600.0:
        np.add.at(out, g, binary_log_lr(y, p, a_, b_, eps=eps))
        return out
    log_p, log_1mp = np.log(p), np.log1p(-p)
    z = log_p - log_1mp
    slopes = {float(v): np.flatnonzero(b_ == v) for v in np.unique(b_)}
    for sign, chosen in ((1.0, y == 1), (-1.0, y != 1)):
        gs = g[chosen]
        if not gs.size:
            continue
        order = np.argsort(gs, kind="stable")
        ranked = gs[order]
        firsts = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]])
        zs = z[chosen][order]
        base = (log_p if sign > 0 else log_1mp)[chosen][order]
        # y = 1: log q - log p = -log1p(e^-a e^-bz) - log p; y = 0: -log1p(e^a e^bz) - log(1-p).
        cells = np.empty((zs.size, a_.size))
        for slope, columns in slopes.items():
            e = np.exp(-sign * slope * zs)
            for j in columns:
                np.multiply(e, math.exp(-sign * a_[j]), out=cells[:, j])
        np.log1p(cells, out=cells)
        cells += base[:, None]
        out[ranked[firsts]] -= np.add.reduceat(cells, firsts, axis=0)
    return out


@dataclass(frozen=True, eq=False)
class TemperatureEvidence(_EvidenceState):
    """Multiclass mixture e-process over temperature alternatives ``q_k ∝ p_k^(1/T)``.

    ``params`` has one column, the temperatures. Each probability row is
    clipped at ``eps`` from below and renormalised before use, so ``T = 1``
    contributes a likelihood ratio of exactly one.

    References
    ----------
    METHODS.md §7.2 "Multiclass extension"; temperature scaling from Guo,
    Pleiss, Sun & Weinberger, "On calibration of modern neural networks",
    ICML 2017.
    """

    kind: ClassVar[str] = "temperature"
    n_params: ClassVar[int] = 1

    @classmethod
    def start(
        cls,
        temperatures: ArrayLike = DEFAULT_TEMPERATURES,
        *,
        weights: ArrayLike | None = None,
        eps: float = EPS,
    ) -> TemperatureEvidence:
        """A fresh state (E = 1) on the given temperature grid."""
        t = np.asarray(temperatures, dtype=np.float64).reshape(-1)
        if t.size == 0 or not (np.isfinite(t) & (t > 0)).all():
            raise ValueError(f"temperatures: expected positive finite values, got {t!r}")
        if not 0.0 < eps < 0.5:
            raise ValueError(f"eps: expected a value in (0, 0.5), got {eps!r}")
        return cls(
            params=_frozen(t[:, None]),
            log_weights=_log_weights(weights, t.size),
            log_lr=_frozen(np.zeros(t.size)),
            eps=float(eps),
        )

    def _check_batch(self, y_true: ArrayLike, y_prob: ArrayLike) -> tuple[Any, Any]:
        p = np.asarray(y_prob, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] < 2:
            raise ValueError(f"y_prob: expected a 2-D array with >= 2 columns, got shape {p.shape}")
        y = np.asarray(y_true)
        if y.ndim != 1 or y.shape[0] != p.shape[0]:
            raise ValueError(
                f"y_true: expected a 1-D array of length {p.shape[0]}, got shape {y.shape}"
            )
        if y.size and (y.dtype.kind not in "iub" or y.min() < 0 or y.max() >= p.shape[1]):
            raise ValueError(
                f"y_true: expected class indices in 0..{p.shape[1] - 1}, "
                f"got values {np.unique(y)[:5]!r}"
            )
        if not ((p >= 0.0) & (p <= 1.0)).all():
            raise ValueError("y_prob: expected probabilities in [0, 1], got values outside")
        return y.astype(np.intp), p

    def _row_log_lr(self, y_true: ArrayLike, y_prob: ArrayLike) -> FloatArray:
        y = np.asarray(y_true, dtype=np.intp)
        log_p = np.log(np.clip(np.asarray(y_prob, dtype=np.float64), self.eps, 1.0))
        log_p -= logsumexp(log_p, axis=1, keepdims=True)
        inv_t = 1.0 / self.params[:, 0]  # (J,)
        scaled = log_p[:, :, None] * inv_t[None, None, :]  # (n, K, J)
        log_q_y = scaled[np.arange(y.shape[0]), y, :] - logsumexp(scaled, axis=1)
        out: FloatArray = log_q_y - log_p[np.arange(y.shape[0]), y][:, None]
        return out


def log_threshold(*, alpha: float, n_slices: int = 1) -> float:
    """``ln(K / alpha)``: the paging threshold for K slices (Ville plus Bonferroni, §7.4).

    Alarming slice k when ``E^k >= K/alpha`` keeps the chance of any false
    alarm, ever, over all true-null slices below ``alpha`` under any dependence.
    """
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha: expected a value in (0, 1), got {alpha!r}")
    if isinstance(n_slices, bool) or not isinstance(n_slices, int) or n_slices < 1:
        raise ValueError(f"n_slices: expected a positive integer, got {n_slices!r}")
    return math.log(n_slices / alpha)


def log_evidence_path(
    y_true: ArrayLike, y_prob: ArrayLike, *, state: MixtureEvidence | None = None
) -> FloatArray:
    """``log E`` after each row of a binary batch, starting from ``state`` (default: fresh).

    Examples
    --------
    >>> log_evidence_path([1, 0], [0.2, 0.7]).round(4).tolist()
    [0.0389, 0.0422]
    """
    start = MixtureEvidence.start() if state is None else state
    return start.update_with_path(y_true, y_prob)[1]


__all__ = [
    "DEFAULT_INTERCEPTS",
    "DEFAULT_SLOPES",
    "DEFAULT_TEMPERATURES",
    "EPS",
    "CusumThreshold",
    "MixtureEvidence",
    "RiskAdjustedCusum",
    "TemperatureEvidence",
    "binary_log_lr",
    "binary_log_lr_sums",
    "cusum_threshold_by_simulation",
    "cusum_weights",
    "log_evidence_path",
    "log_threshold",
]
