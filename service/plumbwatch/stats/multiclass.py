"""Multiclass scores and calibration errors, from arrays or from a sketch.

Inputs: ``y_true`` holds class indices ``0..K-1`` (the caller maps class
names to indices in its declared order); ``y_prob`` is ``(n, K)`` with rows
summing to one (within 1e-6).

Conventions (METHODS.md §1, §2.3):

* log loss in nats, probabilities clipped to ``[eps, 1 - eps]`` with the
  float64 machine epsilon, as scikit-learn >= 1.5 does;
* Brier summed over classes, ``mean_i sum_k (p_ik - 1[y_i = k])^2``, range
  [0, 2] (scikit-learn's default for multiclass, not halved);
* equal-width bins with ``b = min(floor(p B), B - 1)``; empty bins skipped;
* top-label ECE uses ``c = max_k p_k`` and ``a = 1[argmax = y]``, argmax ties
  going to the lowest class index (numpy's ``argmax``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.calibration import ece_from_bins
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.intp]

_EPS = float(np.finfo(np.float64).eps)
_ROW_SUM_TOL = 1e-6


def check_multiclass(y_true: ArrayLike, y_prob: ArrayLike) -> tuple[IntArray, FloatArray]:
    """Validate class indices and a probability matrix; return (int indices, float64 matrix)."""
    p = np.asarray(y_prob, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] < 2:
        raise ValueError(f"y_prob: expected an (n, K) array with K >= 2, got shape {p.shape}")
    if not ((p >= 0.0) & (p <= 1.0)).all():
        raise ValueError("y_prob: expected probabilities in [0, 1], got others (or NaN)")
    sums = p.sum(axis=1)
    if p.shape[0] and np.max(np.abs(sums - 1.0)) > _ROW_SUM_TOL:
        i = int(np.argmax(np.abs(sums - 1.0)))
        raise ValueError(f"y_prob: expected rows summing to 1, got {sums[i]!r} in row {i}")
    y = np.asarray(y_true)
    if y.ndim != 1 or y.shape[0] != p.shape[0]:
        raise ValueError(f"y_true: expected a 1-D array of length {p.shape[0]}, got {y.shape}")
    if y.size:
        if y.dtype.kind not in "iub":
            raise ValueError(f"y_true: expected integer class indices, got dtype {y.dtype}")
        if y.min() < 0 or y.max() >= p.shape[1]:
            bad = y[(y < 0) | (y >= p.shape[1])][0]
            raise ValueError(f"y_true: expected class indices in 0..{p.shape[1] - 1}, got {bad}")
    return y.astype(np.intp), p


def _nonempty(y: IntArray) -> None:
    if y.shape[0] == 0:
        raise Undefined("no_rows", "there are no rows")


def multiclass_log_loss(y_true: ArrayLike, y_prob: ArrayLike) -> float:
    """Mean ``-ln p_{i, y_i}`` (nats), ``p`` clipped at float64 eps like scikit-learn.

    Examples
    --------
    >>> P = [[.7, .2, .1], [.1, .6, .3], [.2, .2, .6], [.3, .4, .3]]
    >>> round(multiclass_log_loss([0, 1, 2, 2], P), 6)
    0.645575
    """
    y, p = check_multiclass(y_true, y_prob)
    _nonempty(y)
    picked = np.clip(p[np.arange(y.shape[0]), y], _EPS, 1.0 - _EPS)
    return float(-np.mean(np.log(picked)))


def multiclass_brier(y_true: ArrayLike, y_prob: ArrayLike) -> float:
    """Brier score summed over classes, in [0, 2] (Brier 1950's original form)."""
    y, p = check_multiclass(y_true, y_prob)
    _nonempty(y)
    return float(np.mean(_brier_rows(y, p)))


def _brier_rows(y: IntArray, p: FloatArray) -> FloatArray:
    rows = np.arange(y.shape[0])
    picked = p[rows, y]
    # sum_k (p_k - 1[k=y])^2 = sum_k p_k^2 - 2 p_y + 1
    out: FloatArray = np.sum(p * p, axis=1) - 2.0 * picked + 1.0
    return out


def _binned_ece(conf: FloatArray, hit: FloatArray, n_bins: int) -> float:
    b = np.minimum(np.floor(conf * n_bins).astype(np.intp), n_bins - 1)
    count = np.bincount(b, minlength=n_bins).astype(np.float64)
    return ece_from_bins(
        count,
        np.bincount(b, weights=hit, minlength=n_bins),
        np.bincount(b, weights=conf, minlength=n_bins),
    )


def top_label(y_true: ArrayLike, y_prob: ArrayLike) -> tuple[FloatArray, FloatArray]:
    """Confidence ``max_k p_k`` and correctness ``1[argmax = y]`` (ties: lowest index)."""
    y, p = check_multiclass(y_true, y_prob)
    pred = np.argmax(p, axis=1)
    conf: FloatArray = p[np.arange(y.shape[0]), pred]
    return conf, (pred == y).astype(np.float64)


def top_label_ece(y_true: ArrayLike, y_prob: ArrayLike, *, n_bins: int = 15) -> float:
    """Top-label (confidence) ECE with equal-width bins.

    References
    ----------
    Guo, Pleiss, Sun & Weinberger, "On calibration of modern neural networks",
    ICML 2017 (PMLR 70:1321-1330), section 2; METHODS.md §2.3.
    """
    conf, hit = top_label(y_true, y_prob)
    if conf.shape[0] == 0:
        raise Undefined("no_rows", "there are no rows")
    return _binned_ece(conf, hit, n_bins)


def classwise_ece(y_true: ArrayLike, y_prob: ArrayLike, *, n_bins: int = 15) -> float:
    """Classwise ECE ``(1/K) sum_k ECE_B(p_k, 1[y = k])``.

    References
    ----------
    Kull et al., "Beyond temperature scaling: obtaining well-calibrated
    multi-class probabilities with Dirichlet calibration", NeurIPS 2019,
    section 2; METHODS.md §2.3.
    """
    y, p = check_multiclass(y_true, y_prob)
    _nonempty(y)
    k = p.shape[1]
    per_class = [_binned_ece(p[:, j], (y == j).astype(np.float64), n_bins) for j in range(k)]
    return float(np.mean(per_class))


@dataclass(frozen=True, eq=False)
class MulticlassSketch:
    """Mergeable summary of multiclass rows on the fine probability grid.

    ``per_class[k]`` is the one-vs-rest binary :class:`Sketch` of
    ``(1[y = k], p_k)``; ``top`` the binary sketch of (correct, confidence);
    ``sum_log_loss`` and ``sum_brier`` the multiclass per-row sums (they are
    not recoverable from the binary sketches). Equal-width ECE for 10 and 15
    bins is exact from the sketch because the grid contains those edges.
    """

    per_class: tuple[Sketch, ...]
    top: Sketch
    sum_log_loss: float
    sum_brier: float

    @classmethod
    def from_arrays(cls, y_true_idx: ArrayLike, y_prob_matrix: ArrayLike) -> MulticlassSketch:
        """Summarise rows of class indices and probability rows."""
        y, p = check_multiclass(y_true_idx, y_prob_matrix)
        per = tuple(
            Sketch.from_arrays((y == j).astype(np.float64), p[:, j]) for j in range(p.shape[1])
        )
        conf, hit = top_label(y, p)
        rows = np.arange(y.shape[0])
        ll = float(-np.sum(np.log(np.clip(p[rows, y], _EPS, 1.0 - _EPS))))
        return cls(per, Sketch.from_arrays(hit, conf), ll, float(np.sum(_brier_rows(y, p))))

    @property
    def n_classes(self) -> int:
        return len(self.per_class)

    @property
    def n(self) -> float:
        return self.top.n

    @property
    def events_by_class(self) -> tuple[float, ...]:
        """Rows observed in each class, in class-index order."""
        return tuple(s.events for s in self.per_class)

    def _combine(self, other: object, sign: float) -> MulticlassSketch:
        if not isinstance(other, MulticlassSketch):
            return NotImplemented
        if other.n_classes != self.n_classes:
            raise ValueError(
                f"other: expected a sketch with {self.n_classes} classes, got {other.n_classes}"
            )
        if sign > 0:
            per = tuple(a + b for a, b in zip(self.per_class, other.per_class, strict=True))
            top = self.top + other.top
        else:
            per = tuple(a - b for a, b in zip(self.per_class, other.per_class, strict=True))
            top = self.top - other.top
        return MulticlassSketch(
            per,
            top,
            max(0.0, self.sum_log_loss + sign * other.sum_log_loss),
            max(0.0, self.sum_brier + sign * other.sum_brier),
        )

    def __add__(self, other: object) -> MulticlassSketch:
        return self._combine(other, 1.0)

    def __sub__(self, other: object) -> MulticlassSketch:
        return self._combine(other, -1.0)

    def to_bytes(self) -> bytes:
        """Version byte, class count, the two sums, then length-prefixed binary sketches."""
        head = bytes([1]) + np.array([self.n_classes], "<u2").tobytes()
        head += np.array([self.sum_log_loss, self.sum_brier], "<f8").tobytes()
        parts = [head]
        for s in (self.top, *self.per_class):
            b = s.to_bytes()
            parts.append(np.array([len(b)], "<u4").tobytes() + b)
        return b"".join(parts)

    @classmethod
    def from_bytes(cls, data: bytes) -> MulticlassSketch:
        """Inverse of :meth:`to_bytes`."""
        if len(data) < 19 or data[0] != 1:
            raise ValueError("data: expected a multiclass sketch, format version 1")
        k = int(np.frombuffer(data, "<u2", 1, 1)[0])
        ll, br = np.frombuffer(data, "<f8", 2, 3)
        pos = 19
        sketches = []
        for _ in range(k + 1):
            if pos + 4 > len(data):
                raise ValueError(f"data: expected more than {len(data)} bytes (truncated)")
            size = int(np.frombuffer(data, "<u4", 1, pos)[0])
            pos += 4
            if pos + size > len(data):
                raise ValueError(f"data: expected {pos + size} bytes, got {len(data)} (truncated)")
            sketches.append(Sketch.from_bytes(data[pos : pos + size]))
            pos += size
        if pos != len(data):
            raise ValueError(f"data: expected {pos} bytes, got {len(data)}")
        return cls(tuple(sketches[1:]), sketches[0], float(ll), float(br))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MulticlassSketch):
            return NotImplemented
        return (
            self.per_class == other.per_class
            and self.top == other.top
            and self.sum_log_loss == other.sum_log_loss
            and self.sum_brier == other.sum_brier
        )

    __hash__ = None  # type: ignore[assignment]


def _sketch_ece(s: Sketch, n_bins: int) -> float:
    c = s.coarse_sums(n_bins)
    return ece_from_bins(c["count"], c["sum_y"], c["sum_p"])


def multiclass_metrics(
    sketch: MulticlassSketch, *, n_bins: int = 15
) -> tuple[dict[str, float | None], dict[str, str]]:
    """Metrics ``n``, ``log_loss``, ``brier``, ``ece_top_label``, ``ece_classwise``.

    Returns ``(metrics, reasons)``: a metric that cannot be computed is None
    with its reason code in ``reasons``. ``n_bins`` must be 10 or 15 (the
    grid-exact equal-width binnings).
    """
    n = sketch.n
    metrics: dict[str, float | None] = {"n": n}
    reasons: dict[str, str] = {}
    names = ("log_loss", "brier", "ece_top_label", "ece_classwise")
    if n <= 0:
        for name in names:
            metrics[name] = None
            reasons[name] = "no_rows"
        return metrics, reasons
    metrics["log_loss"] = sketch.sum_log_loss / n
    metrics["brier"] = sketch.sum_brier / n
    metrics["ece_top_label"] = _sketch_ece(sketch.top, n_bins)
    metrics["ece_classwise"] = float(np.mean([_sketch_ece(s, n_bins) for s in sketch.per_class]))
    return metrics, reasons


__all__ = [
    "MulticlassSketch",
    "check_multiclass",
    "classwise_ece",
    "multiclass_brier",
    "multiclass_log_loss",
    "multiclass_metrics",
    "top_label",
    "top_label_ece",
]
