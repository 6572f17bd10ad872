"""The fixed probability grid that every sketch is binned on.

Layout
------
``GRID_EDGES`` holds ``N_BINS + 1`` ascending float64 edges, ``0.0`` first and
``1.0`` last. Bins are left-closed, ``[e_k, e_{k+1})``, and the last bin is also
closed at 1.0. The edges are the union of

1. the *equal-width thresholds* for 10 and 15 bins (see below), so that
   10- and 15-bin equal-width statistics computed from a sketch are exact;
2. ``sigmoid(z)`` for z on a uniform grid of step ``LOGIT_STEP`` (0.02) from
   ``logit(1e-6)`` to ``logit(1 - 1e-6)``. In logit units every interior bin is
   at most 0.02 wide, so relative resolution is about 2 % down to p = 1e-6
   (a bin near 1e-4 spans about 2e-6) and about 0.005 near p = 0.5;
3. the outer edges ``1e-6`` and ``1 - 1e-6`` themselves, which match the clip
   used before logits in the logistic fits: the two outermost bins hold rows
   whose clipped logit is a single value.

Equal-width thresholds
----------------------
The service's equal-width rule (METHODS.md §2.1) is ``b = min(floor(p*B), B-1)``.
Because ``p*B`` is rounded, the rule's boundary between bins k-1 and k is the
smallest float64 ``t`` with ``floor(t*B) >= k``; the grid stores exactly that
``t``. For every k it equals Python's ``k / B`` except 9/10, where it is
``0.8999999999999999`` (the float just below ``0.9``, because
``0.8999999999999999 * 10 == 9.0``). These are *not* all ``np.linspace`` values:
``np.linspace(0, 1, 11)[3]`` is ``0.30000000000000004``, whereas the rule (and
the grid) put ``0.3`` itself in bin 3. A test checks that ``bin_index`` agrees
with the rule for values on and next to every threshold.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike, NDArray

LOGIT_STEP = 0.02
P_CLIP = 1e-6
EQUAL_WIDTH_BINS = (10, 15)


def floor_rule_threshold(k: int, n_bins: int) -> float:
    """Smallest float64 ``t`` with ``min(floor(t * n_bins), n_bins - 1) >= k``."""
    t = k / n_bins
    while min(math.floor(float(np.nextafter(t, 0.0)) * n_bins), n_bins - 1) >= k:
        t = float(np.nextafter(t, 0.0))
    while min(math.floor(t * n_bins), n_bins - 1) < k:
        t = float(np.nextafter(t, 1.0))
    return t


def _build_edges() -> NDArray[np.float64]:
    z_max = math.log((1.0 - P_CLIP) / P_CLIP)
    n_steps = math.ceil(2.0 * z_max / LOGIT_STEP)
    z = np.linspace(-z_max, z_max, n_steps + 1)
    logit_edges = 1.0 / (1.0 + np.exp(-z))
    thresholds = [floor_rule_threshold(k, b) for b in EQUAL_WIDTH_BINS for k in range(1, b)]
    edges = np.concatenate([[0.0, 1.0, P_CLIP, 1.0 - P_CLIP], logit_edges[1:-1], thresholds])
    return np.unique(edges)


GRID_EDGES: NDArray[np.float64] = _build_edges()
GRID_EDGES.setflags(write=False)
N_BINS: int = GRID_EDGES.shape[0] - 1
BIN_LOW: NDArray[np.float64] = GRID_EDGES[:-1]
BIN_HIGH: NDArray[np.float64] = GRID_EDGES[1:]


P_HIGH = 1.0 - P_CLIP
# Bounds on log(p) and log(1 - p) that reproduce clipping p to [P_CLIP, P_HIGH]
# (1 - P_HIGH is not exactly P_CLIP in float64, hence the two pairs).
LOG_P_BOUNDS = (math.log(P_CLIP), math.log(P_HIGH))
LOG_1MP_BOUNDS = (math.log(1.0 - P_HIGH), math.log(1.0 - P_CLIP))


def clipped_logit(p: NDArray[np.float64]) -> NDArray[np.float64]:
    """``log(q) - log(1 - q)`` with ``q = clip(p, 1e-6, 1 - 1e-6)``.

    This is the covariate of the logistic recalibration fits (METHODS.md §5.1);
    sketches store sums of exactly these float64 values.
    """
    pc = np.clip(p, P_CLIP, P_HIGH)
    return np.log(pc) - np.log(1.0 - pc)


def _logit_lookup() -> NDArray[np.intp]:
    # For each cell j of the uniform logit grid, the merged-grid bin holding the
    # cell's left end; a couple of exact comparisons then fix rounding and the
    # few cells split by an equal-width threshold.
    z_max = math.log((1.0 - P_CLIP) / P_CLIP)
    n_cells = math.ceil(2.0 * z_max / LOGIT_STEP)
    left = 1.0 / (1.0 + np.exp(-(-z_max + LOGIT_STEP * np.arange(n_cells + 1))))
    idx = np.searchsorted(GRID_EDGES, left, side="right") - 1
    return np.clip(idx, 0, N_BINS - 1)


_Z_MAX = math.log((1.0 - P_CLIP) / P_CLIP)
_LOOKUP = _logit_lookup()
_UPPER = np.append(GRID_EDGES[1:-1], np.inf)  # the last bin is closed at 1.0


def bin_index(p: ArrayLike, z: NDArray[np.float64] | None = None) -> NDArray[np.intp]:
    """Grid bin of each probability: ``[e_k, e_{k+1})``, the last bin closed at 1.

    ``p`` is assumed validated (finite, in [0, 1]). ``z`` may pass the already
    computed :func:`clipped_logit` of ``p`` to save work. The result equals
    ``min(searchsorted(GRID_EDGES, p, side="right") - 1, N_BINS - 1)``; it is
    computed from the logit (one table look-up plus exact edge comparisons)
    because a binary search over 1,400 edges is several times slower.
    """
    p = np.asarray(p, dtype=np.float64)
    if z is None:
        z = clipped_logit(p)
    j = ((z + _Z_MAX) * (1.0 / LOGIT_STEP)).astype(np.intp)
    np.clip(j, 0, _LOOKUP.shape[0] - 1, out=j)
    idx = _LOOKUP[j]
    for _ in range(2):
        idx -= p < GRID_EDGES[idx]
        idx += p >= _UPPER[idx]
    return idx


@lru_cache(maxsize=4)
def coarse_map(n_bins: int) -> NDArray[np.intp]:
    """Equal-width bin (rule ``min(floor(p*B), B-1)``) of every grid bin.

    Exact only for the B in ``EQUAL_WIDTH_BINS``; other B raise ``ValueError``
    because their thresholds are not grid edges.
    """
    if n_bins not in EQUAL_WIDTH_BINS:
        raise ValueError(
            f"n_bins: expected one of {EQUAL_WIDTH_BINS} for a grid-exact binning, got {n_bins}"
        )
    thresholds = np.array([floor_rule_threshold(k, n_bins) for k in range(1, n_bins)])
    out = np.searchsorted(thresholds, BIN_LOW, side="right")
    out.setflags(write=False)  # cached and shared
    return out


@lru_cache(maxsize=1)
def grid_fingerprint() -> int:
    """A 32-bit checksum of the edges, stored in serialised sketches."""
    import zlib

    return zlib.crc32(GRID_EDGES.tobytes())
