"""Equal-mass ECE and Hosmer–Lemeshow deciles computed on a sketch's grid.

A sketch knows only per-bin sums, so a quantile cut can fall only on a grid
bin boundary. Cut k aims at ``T_k = k·n/g`` rows; the grid cut is the bin
boundary nearest to ``T_k``. The exact statistic (raw rows, tie-free at the
cut) cuts after ``round(T_k)`` rows (halves rounded down). That position lies
in the same *straddling* bin j, so the two groupings differ by
``m_k = |round(T_k) − cut_k| ≤ n_j / 2 + 1/2`` rows of bin j. From this:

* equal-mass ECE ``= Σ_k |O_k − E_k| / n``: each moved row changes two groups'
  ``O − E`` by ``|y − p| ≤ 1``, so ``|ECE_grid − ECE_exact| ≤ 2 Σ_k m_k / n``;
* Hosmer–Lemeshow: the moved rows' event count lies in
  ``[max(0, m − (n_j − O_j)), min(m, O_j)]`` and their p-sum in
  ``[max(m·lo_j, E_j − (n_j − m)·hi_j), min(m·hi_j, E_j − (n_j − m)·lo_j)]``
  (``lo_j, hi_j`` the bin's edges), which boxes each exact group's (O, E);
  maximising and minimising every term ``(O − E)² / (E (1 − E/n))`` over its
  box brackets the exact Ĉ.

These are worst-case bounds (they assume nothing about which rows of the
straddling bin move); the realised difference is usually far smaller. When
one bin holds more than ``n/g`` rows, grid cuts coincide, fewer groups come
back and the bound is reported as infinite. Counts are taken as row counts
(unweighted sketches).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from plumbwatch.stats import grid
from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_positive_int
from plumbwatch.stats.calibration import (
    HosmerLemeshowResult,
    ece_from_bins,
    hosmer_lemeshow_from_groups,
)
from plumbwatch.stats.discrimination import GridValue
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class _Cuts:
    labels: NDArray[np.intp]  # group of every grid bin
    straddle: NDArray[np.intp]  # bin holding each target
    moved: FloatArray  # m_k
    sign: FloatArray  # +1 when the exact cut lies above the grid cut
    collapsed: bool


def _cuts(count: FloatArray, n_groups: int) -> _Cuts:
    n = float(count.sum())
    if n <= 0.0:
        raise Undefined("no_rows", "the sketch is empty")
    cum = np.cumsum(count)
    targets = n * np.arange(1, n_groups) / n_groups
    j = np.minimum(np.searchsorted(cum, targets, side="left"), count.size - 1)
    below = cum[j] - count[j]
    above = cum[j]
    use_above = (above - targets) < (targets - below)
    cut = np.where(use_above, above, below)
    # Group boundaries as "number of bins below the cut".
    cut_bins = np.where(use_above, j + 1, j)
    # Rows whose centre (i - 1/2) lies below T: the raw rule of equal_mass_groups.
    exact = np.ceil(targets + 0.5) - 1.0
    unique_cuts = np.unique(cut_bins)
    collapsed = unique_cuts.size < cut_bins.size or bool(np.any((cut <= 0) | (cut >= n)))
    labels = np.searchsorted(unique_cuts, np.arange(count.size), side="right")
    return _Cuts(labels, j, np.abs(exact - cut), np.sign(exact - cut), collapsed)


def _sums(sketch: Sketch, labels: NDArray[np.intp]) -> tuple[FloatArray, FloatArray, FloatArray]:
    size = int(labels.max()) + 1
    return (
        np.asarray(np.bincount(labels, weights=sketch.count, minlength=size), dtype=np.float64),
        np.asarray(np.bincount(labels, weights=sketch.sum_y, minlength=size), dtype=np.float64),
        np.asarray(np.bincount(labels, weights=sketch.sum_p, minlength=size), dtype=np.float64),
    )


def ece_equal_mass_from_sketch(sketch: Sketch, *, n_bins: int = 10) -> GridValue:
    """Equal-mass ECE on grid-aligned cuts; ``bound`` per the module docstring."""
    n_bins = check_positive_int(n_bins, "n_bins")
    c = _cuts(sketch.count, n_bins)
    value = ece_from_bins(*_sums(sketch, c.labels))
    bound = float("inf") if c.collapsed else float(2.0 * c.moved.sum() / sketch.n)
    return GridValue(value, bound)


@dataclass(frozen=True)
class HosmerLemeshowGrid:
    """Hosmer–Lemeshow on the grid with a bracket ``[low, high]`` for exact deciles."""

    result: HosmerLemeshowResult
    low: float
    high: float

    @property
    def bound(self) -> float:
        s = self.result.statistic
        return max(self.high - s, s - self.low)


def _term_bounds(
    n: FloatArray, o_lo: FloatArray, o_hi: FloatArray, e_lo: FloatArray, e_hi: FloatArray
) -> tuple[FloatArray, FloatArray]:
    d_lo, d_hi = o_lo - e_hi, o_hi - e_lo
    d_max = np.maximum(np.abs(d_lo), np.abs(d_hi))
    d_min = np.where((d_lo <= 0) & (d_hi >= 0), 0.0, np.minimum(np.abs(d_lo), np.abs(d_hi)))
    e_lo = np.clip(e_lo, 0.0, n)
    e_hi = np.clip(e_hi, 0.0, n)
    v_ends = np.stack([e_lo * (1 - e_lo / n), e_hi * (1 - e_hi / n)])
    v_min = v_ends.min(axis=0)
    half = n / 2.0
    v_max = np.where((e_lo <= half) & (e_hi >= half), n / 4.0, v_ends.max(axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        t_hi = np.where(v_min > 0, d_max**2 / v_min, np.inf)
        t_lo = np.where(v_max > 0, d_min**2 / v_max, 0.0)
    return t_lo, t_hi


def hosmer_lemeshow_from_sketch(
    sketch: Sketch,
    *,
    n_groups: int = 10,
    dof: Literal["external", "development"] = "external",
) -> HosmerLemeshowGrid:
    """Hosmer–Lemeshow Ĉ on grid-aligned deciles, bracketed for exact deciles."""
    n_groups = check_positive_int(n_groups, "n_groups", minimum=2)
    c = _cuts(sketch.count, n_groups)
    n_g, o_g, e_g = _sums(sketch, c.labels)
    result = hosmer_lemeshow_from_groups(n_g, o_g, e_g, dof=dof)
    if c.collapsed or result.n_groups != n_groups:
        return HosmerLemeshowGrid(result, 0.0, float("inf"))
    # Moved rows at each cut: bounds on their count, events and p-sum.
    j = c.straddle
    m = c.moved
    nj, oj, ej = sketch.count[j], sketch.sum_y[j], sketch.sum_p[j]
    lo_e, hi_e = grid.BIN_LOW[j], grid.BIN_HIGH[j]
    y_lo = np.maximum(0.0, m - (nj - oj))
    y_hi = np.minimum(m, oj)
    p_lo = np.maximum(m * lo_e, ej - (nj - m) * hi_e)
    p_hi = np.minimum(m * hi_e, ej - (nj - m) * lo_e)
    # Group k gains s·moved at its upper cut k and loses s·moved at its lower cut k-1.
    n_x, o_lo, o_hi, e_lo, e_hi = (a.copy() for a in (n_g, o_g, o_g, e_g, e_g))
    for k, s in enumerate(c.sign):
        for g, sgn in ((k, s), (k + 1, -s)):
            n_x[g] += sgn * m[k]
            if sgn > 0:
                o_lo[g] += y_lo[k]
                o_hi[g] += y_hi[k]
                e_lo[g] += p_lo[k]
                e_hi[g] += p_hi[k]
            elif sgn < 0:
                o_lo[g] -= y_hi[k]
                o_hi[g] -= y_lo[k]
                e_lo[g] -= p_hi[k]
                e_hi[g] -= p_lo[k]
    t_lo, t_hi = _term_bounds(n_x, o_lo, o_hi, e_lo, e_hi)
    return HosmerLemeshowGrid(result, float(t_lo.sum()), float(t_hi.sum()))
