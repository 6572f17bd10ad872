"""Input checks shared by the statistics modules.

Every helper raises ``ValueError`` with a message that names the parameter,
what was expected and what came. They return float64 copies (or views) that
the caller may use directly.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]


def _describe(a: NDArray[np.generic]) -> str:
    return f"shape {a.shape}, dtype {a.dtype}"


def as_1d_float(x: ArrayLike, name: str) -> FloatArray:
    """Return ``x`` as a 1-D float64 array, rejecting other shapes and non-numbers."""
    a = np.asarray(x)
    if a.ndim != 1:
        raise ValueError(f"{name}: expected a 1-D array, got {_describe(a)}")
    if a.dtype.kind not in "biuf":
        raise ValueError(f"{name}: expected numbers, got dtype {a.dtype}")
    return a.astype(np.float64, copy=False)


def check_probabilities(y_prob: ArrayLike, name: str = "y_prob") -> FloatArray:
    """1-D float64 probabilities in [0, 1]; NaN and infinities are rejected."""
    p = as_1d_float(y_prob, name)
    # NaN fails both comparisons, so this one pass also rejects NaN.
    ok = (p >= 0.0) & (p <= 1.0)
    if not ok.all():
        bad = p[~ok][0]
        raise ValueError(f"{name}: expected probabilities in [0, 1], got {bad!r}")
    return p


def check_binary(y_true: ArrayLike, name: str = "y_true") -> FloatArray:
    """1-D outcomes in {0, 1} (bool, int or float), returned as float64."""
    y = as_1d_float(y_true, name)
    ok = (y == 0.0) | (y == 1.0)
    if not ok.all():
        bad = y[~ok][0]
        raise ValueError(f"{name}: expected outcomes in {{0, 1}}, got {bad!r}")
    return y


def check_weights(sample_weight: ArrayLike | None, n: int) -> FloatArray | None:
    """Finite non-negative weights of length ``n``, or None."""
    if sample_weight is None:
        return None
    w = as_1d_float(sample_weight, "sample_weight")
    if w.shape[0] != n:
        raise ValueError(f"sample_weight: expected length {n}, got length {w.shape[0]}")
    if not (np.isfinite(w) & (w >= 0.0)).all():
        raise ValueError("sample_weight: expected finite non-negative weights, got others")
    return w


def check_binary_pair(
    y_true: ArrayLike,
    y_prob: ArrayLike,
    sample_weight: ArrayLike | None = None,
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """Validate the usual ``(y_true, y_prob, sample_weight)`` triple together."""
    y = check_binary(y_true)
    p = check_probabilities(y_prob)
    if y.shape != p.shape:
        raise ValueError(
            f"y_true and y_prob: expected the same length, got {y.shape[0]} and {p.shape[0]}"
        )
    w = check_weights(sample_weight, y.shape[0])
    return y, p, w


def check_positive_int(value: int, name: str, minimum: int = 1) -> int:
    """An integer (not bool) of at least ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ValueError(f"{name}: expected an integer, got {type(value).__name__}")
    if value < minimum:
        raise ValueError(f"{name}: expected an integer >= {minimum}, got {value}")
    return int(value)


def check_level(level: float, name: str = "level") -> float:
    """A confidence level strictly between 0 and 1."""
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"{name}: expected a value in (0, 1), got {level!r}")
    return float(level)
