"""Binned reliability points with intervals, and a histogram of forecasts, from a sketch.

These feed the reliability diagram of the status pages: the equal-width bins are
those of the reported ``ece`` (10 bins, exact on the grid), each with the
observed event rate and a Wilson score interval; the histogram shows where the
forecasts lie.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import special

from plumbwatch.stats import grid
from plumbwatch.stats._validate import check_level, check_positive_int
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]


def wilson_interval(
    events: FloatArray | float, n: FloatArray | float, *, level: float = 0.95
) -> tuple[FloatArray, FloatArray]:
    """Wilson score interval for a binomial proportion ``events / n`` (NaN where n = 0).

    References
    ----------
    Wilson, E. B. (1927). Probable inference, the law of succession, and
    statistical inference. *JASA* 22(158), 209-212.
    Brown, L. D., Cai, T. T. & DasGupta, A. (2001). Interval estimation for a
    binomial proportion. *Statistical Science* 16(2), eq. (4).
    """
    level = check_level(level)
    k = np.asarray(events, dtype=np.float64)
    m = np.asarray(n, dtype=np.float64)
    z = float(special.ndtri(1.0 - (1.0 - level) / 2.0))
    z2 = z * z
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = (k + z2 / 2.0) / (m + z2)
        half = z / (m + z2) * np.sqrt(np.maximum(k * (m - k) / m, 0.0) + z2 / 4.0)
        low = np.where(m > 0, np.clip(centre - half, 0.0, 1.0), np.nan)
        high = np.where(m > 0, np.clip(centre + half, 0.0, 1.0), np.nan)
    return low, high


@dataclass(frozen=True)
class BinnedReliability:
    """Per equal-width bin: edges, rows, events, mean forecast, observed rate, interval.

    Empty bins have ``count == 0`` and NaN rates and limits.
    """

    low: FloatArray
    high: FloatArray
    count: FloatArray
    events: FloatArray
    mean_predicted: FloatArray
    observed_rate: FloatArray
    ci_low: FloatArray
    ci_high: FloatArray
    level: float


def _by_mean_forecast(sketch: Sketch, n_bins: int, upper: float) -> tuple[FloatArray, ...]:
    """Grid bins grouped by the equal-width bin of ``[0, upper]`` holding their mean
    forecast (the rest in the last bin): off by at most the rows of one grid bin
    (about 0.005 wide at most) at each edge."""
    keep = sketch.count > 0
    mean_p = sketch.sum_p[keep] / sketch.count[keep]
    index = np.minimum(np.floor(mean_p / upper * n_bins), n_bins - 1).astype(np.intp)
    return tuple(
        np.bincount(index, weights=getattr(sketch, name)[keep], minlength=n_bins).astype(np.float64)
        for name in ("count", "sum_y", "sum_p")
    )


def binned_reliability_from_sketch(
    sketch: Sketch, *, n_bins: int = 10, level: float = 0.95, upper: float = 1.0
) -> BinnedReliability:
    """Equal-width bins of ``[0, upper]``.

    With ``upper = 1`` and 10 or 15 bins (rule ``min(floor(p*B), B-1)``) the bins
    are exact on the grid and are those of the reported ECE; otherwise (a zoomed
    diagram for rare events) grid bins are placed by their mean forecast.
    """
    n_bins = check_positive_int(n_bins, "n_bins")
    level = check_level(level)
    if not 0.0 < upper <= 1.0:
        raise ValueError(f"upper: expected a value in (0, 1], got {upper!r}")
    if upper == 1.0 and n_bins in grid.EQUAL_WIDTH_BINS:
        sums = sketch.coarse_sums(n_bins)
        count, sum_y, sum_p = sums["count"], sums["sum_y"], sums["sum_p"]
    else:
        count, sum_y, sum_p = _by_mean_forecast(sketch, n_bins, upper)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_p = np.where(count > 0, sum_p / count, np.nan)
        rate = np.where(count > 0, sum_y / count, np.nan)
    ci_low, ci_high = wilson_interval(sum_y, count, level=level)
    edges = np.arange(n_bins + 1) / n_bins * upper
    return BinnedReliability(
        edges[:-1], edges[1:], count, sum_y, mean_p, rate, ci_low, ci_high, level
    )


def forecast_histogram_from_sketch(
    sketch: Sketch, *, n_bins: int = 20, upper: float = 1.0
) -> tuple[FloatArray, FloatArray]:
    """Rows per equal-width bin of ``[0, upper]``: ``(edges, counts)``.

    Each grid bin goes to the histogram bin of its mean forecast, so a row can
    land one bin off only when its grid bin straddles an edge (grid bins are at
    most about 0.005 wide); rows above ``upper`` join the last bin.
    """
    n_bins = check_positive_int(n_bins, "n_bins")
    if not 0.0 < upper <= 1.0:
        raise ValueError(f"upper: expected a value in (0, 1], got {upper!r}")
    counts = _by_mean_forecast(sketch, n_bins, upper)[0]
    return np.linspace(0.0, upper, n_bins + 1), counts


def forecast_quantile_from_sketch(sketch: Sketch, q: float) -> float:
    """The ``q`` quantile of the forecasts, to the grid's resolution (upper bin edge)."""
    if not 0.0 <= q <= 1.0:
        raise ValueError(f"q: expected a value in [0, 1], got {q!r}")
    cum = np.cumsum(sketch.count)
    if cum.size == 0 or cum[-1] <= 0:
        return float("nan")
    k = int(np.searchsorted(cum, q * cum[-1], side="left"))
    return float(grid.BIN_HIGH[min(k, grid.N_BINS - 1)])


__all__ = [
    "BinnedReliability",
    "binned_reliability_from_sketch",
    "forecast_histogram_from_sketch",
    "forecast_quantile_from_sketch",
    "wilson_interval",
]
