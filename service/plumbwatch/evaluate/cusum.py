"""Risk-adjusted CUSUM charts beside each binary evidence stream, and their threshold.

Each stream carries two Bernoulli CUSUM charts (METHODS.md §8): ``up`` tuned to
odds x2 (under-prediction) and ``down`` to odds x1/2 (over-prediction). A chart
signals when it reaches ``h``; unlike the e-process it controls the false-alarm
*rate*, through the in-control average run length ARL0 (in matured rows of the
slice), which is what teams that think in run lengths ask for.

The threshold is set by simulation as METHODS.md §8 explains: probabilities are
resampled from the slice's case mix, outcomes drawn from them (in control by
construction), and ``h`` is the smallest value whose simulated ARL0 reaches the
target. Choices, for cost (simulation is the dearest thing in a run):

* The case mix is the histogram of ``logit p`` over the stream's first 1,000
  matured rows (0.5-wide bins on [-5, 5] plus two tails), frozen then, so ``h``
  depends on the stream's own data only and a replay computes the same ``h``.
* It is summarised by three quantiles of ``logit p`` (10, 50 and 90 %), each
  rounded to 0.5, and the simulation resamples 20 probabilities spread evenly
  over a two-piece normal in logit space through those quantiles. Slices with
  like case mixes thus share one simulation (cached per process, and given to
  every stream with that summary in the same run); the summary is coarse, but the
  threshold moves little with the case mix, and the bound below holds whatever it
  is.
* The two charts together should signal falsely once per ``target`` rows, so each
  is simulated to ``2 x target`` (their false-signal rates add) and the larger of
  the two ``h`` is used for both: the pair's ARL0 is then at least the target.
* 80 runs per simulation (ARL0 within about 11 %, h within about 0.1),
  censored at 2.5 times the per-chart target (a censored run counts at the cap,
  so ARL0 is if anything underestimated and ``h`` errs high); at most one new
  simulation per evaluation run (about 0.3 s of CPU), the rest wait for later runs
  with ``threshold`` null.

The guaranteed bound ``ARL0 >= e^h`` (METHODS.md §8) holds whatever the case mix.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

from plumbwatch.stats import RiskAdjustedCusum, cusum_threshold_by_simulation

CASE_MIX_ROWS = 1_000
_EDGES = np.arange(-5.0, 5.0 + 1e-9, 0.5)  # interior logit edges; bins: tail, 20, tail
_SIMS = 80
SIMULATIONS_PER_RUN = 1


@dataclass
class Track:
    """A stream's two charts, their threshold once known, and the case mix behind it."""

    chart: RiskAdjustedCusum = field(default_factory=RiskAdjustedCusum.start)
    threshold: float | None = None
    case_mix: list[int] = field(default_factory=lambda: [0] * (_EDGES.size + 1))
    frozen: bool = False

    @property
    def signalled(self) -> bool:
        """A chart is at or past its threshold now (a chart falls back towards 0 when
        the slice is calibrated again, so this clears by itself)."""
        return self.threshold is not None and max(self.chart.statistic) >= self.threshold

    def to_json(self) -> str:
        return orjson.dumps(
            {
                "chart": self.chart.to_dict(),
                "threshold": self.threshold,
                "case_mix": self.case_mix,
                "frozen": self.frozen,
            }
        ).decode()

    @classmethod
    def from_json(cls, text: str | None) -> Track:
        if not text:
            return cls()
        data: dict[str, Any] = orjson.loads(text)
        return cls(
            RiskAdjustedCusum.from_dict(data["chart"]),
            data["threshold"],
            list(data["case_mix"]),
            bool(data["frozen"]),
        )

    def record(self, target_arl0: int) -> dict[str, Any]:
        up, down = self.chart.statistic
        return {
            "up": up,
            "down": down,
            "threshold": self.threshold,
            "signalled": self.signalled,
            "ever_signalled": self.threshold is not None
            and any(self.chart.signalled(self.threshold)),
            "arl0_target": target_arl0,
            "n": self.chart.n,
        }


def mix_bins(p: NDArray[np.float64]) -> NDArray[np.intp]:
    """Each row's case-mix bin (``logit p`` on the grid of ``_EDGES``)."""
    q = np.clip(p, 1e-6, 1 - 1e-6)
    return np.searchsorted(_EDGES, np.log(q) - np.log1p(-q), side="right")


def update(track: Track, weights: NDArray[np.float64], bins: NDArray[np.intp]) -> Track:
    """Feed rows in maturity order, given their chart weights (``cusum_weights`` for the
    track's odds ratios) and case-mix bins (:func:`mix_bins`), both computed once for
    every stream the rows feed; grow the case mix until it holds 1,000 rows."""
    if not weights.shape[0]:
        return track
    chart = track.chart.update_with_weights(weights)
    mix, frozen = track.case_mix, track.frozen
    if not frozen:
        counts = np.bincount(bins, minlength=_EDGES.size + 1)
        mix = [a + int(b) for a, b in zip(mix, counts, strict=True)]
        frozen = sum(mix) >= CASE_MIX_ROWS
    return replace(track, chart=chart, case_mix=mix, frozen=frozen)


_LEVELS = np.array([0.1, 0.5, 0.9])
_Z90 = 1.2815515655446004  # the standard normal's 90 % quantile
# Standard normal quantiles of the levels (i + 0.5) / 20, i = 0..19 (scipy.stats.norm.ppf).
_POOL_Z = np.array(
    [-1.959963984540054, -1.4395314709384563, -1.1503493803760079, -0.9345892910734801,
     -0.7554150263604693, -0.5977601260424784, -0.45376219016987945, -0.3186393639643752,
     -0.18911842627279243, -0.06270677794321385, 0.06270677794321385, 0.18911842627279243,
     0.3186393639643752, 0.45376219016987945, 0.5977601260424784, 0.7554150263604693,
     0.9345892910734801, 1.1503493803760079, 1.4395314709384563, 1.959963984540054]
)  # fmt: skip


def _key(case_mix: list[int]) -> tuple[float, ...]:
    """Three quantiles of logit p from the histogram (linear within bins), rounded to 0.5."""
    counts = np.asarray(case_mix, dtype=np.float64)
    edges = np.concatenate([[-5.5], _EDGES, [5.5]])  # tails closed half a unit out
    cdf = np.concatenate([[0.0], np.cumsum(counts) / counts.sum()])
    q = np.interp(_LEVELS, cdf, edges)
    return tuple(float(v) + 0.0 for v in np.round(q * 2) / 2)  # + 0.0: no -0.0 in keys


def _pool(key: tuple[float, ...]) -> np.ndarray:
    """20 probabilities evenly spread over a two-piece normal through the key's quantiles."""
    low, mid, high = key
    scale = np.where(_POOL_Z < 0, (mid - low) / _Z90, (high - mid) / _Z90)
    out: np.ndarray = 1.0 / (1.0 + np.exp(-(mid + scale * _POOL_Z)))
    return out


# Simulated thresholds by (rounded case mix, target); shared by every model in the process.
_CACHE: dict[tuple[tuple[float, ...], int], float] = {}
_CACHE_SIZE = 512


def _simulate(key: tuple[float, ...], target_arl0: int) -> float:
    per_chart = 2 * target_arl0
    return max(
        cusum_threshold_by_simulation(
            _pool(key),
            target_arl0=per_chart,
            r_a=r_a,
            n_sims=_SIMS,
            seed=0,
            max_run=5 * per_chart // 2,
        ).h
        for r_a in RiskAdjustedCusum().r_a
    )


def assign_thresholds(tracks: list[Track], *, target_arl0: int) -> list[Track]:
    """Give frozen tracks without a threshold one; at most one new simulation per call
    (cached results are free, so every track with a computed summary gets it)."""
    budget = SIMULATIONS_PER_RUN
    out = []
    for track in tracks:
        if track.threshold is None and track.frozen:
            key = (_key(track.case_mix), target_arl0)
            h = _CACHE.get(key)
            if h is None and budget > 0:
                budget -= 1
                h = _simulate(*key)
                if len(_CACHE) >= _CACHE_SIZE:
                    _CACHE.pop(next(iter(_CACHE)))
                _CACHE[key] = h
            if h is not None:
                track = replace(track, threshold=h)
        out.append(track)
    return out


__all__ = [
    "CASE_MIX_ROWS",
    "SIMULATIONS_PER_RUN",
    "Track",
    "assign_thresholds",
    "mix_bins",
    "update",
]
