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
* It is summarised by five quantiles of ``logit p`` (5, 25, 50, 75 and 95 %),
  each rounded to 0.5, and the simulation resamples 20 probabilities spread
  evenly along those quantiles. Slices with like case mixes thus share one
  simulation (cached per process, and given to every stream with that summary in
  the same run); the summary is coarse, but the threshold moves little with the
  case mix, and the bound below holds whatever it is.
* The two charts together should signal falsely once per ``target`` rows, so each
  is simulated to ``2 x target`` (their false-signal rates add) and the larger of
  the two ``h`` is used for both: the pair's ARL0 is then at least the target.
* 100 runs per simulation, censored at three times the per-chart target (a
  censored run counts at the cap, so ARL0 is if anything underestimated and ``h``
  errs high); at most two new simulations per evaluation run, the rest wait for
  later runs with ``threshold`` null.

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
_SIMS = 100
SIMULATIONS_PER_RUN = 2


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


def update(track: Track, y: NDArray[np.float64], p: NDArray[np.float64]) -> Track:
    """Feed rows in maturity order; grow the case mix until it holds 1,000 rows."""
    if not y.size:
        return track
    chart = track.chart.update(y, p)
    mix, frozen = track.case_mix, track.frozen
    if not frozen:
        z = np.log(np.clip(p, 1e-6, 1 - 1e-6)) - np.log1p(-np.clip(p, 1e-6, 1 - 1e-6))
        counts = np.bincount(np.searchsorted(_EDGES, z, side="right"), minlength=_EDGES.size + 1)
        mix = [a + int(b) for a, b in zip(mix, counts, strict=True)]
        frozen = sum(mix) >= CASE_MIX_ROWS
    return replace(track, chart=chart, case_mix=mix, frozen=frozen)


_LEVELS = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
_POOL_LEVELS = (np.arange(20) + 0.5) / 20


def _key(case_mix: list[int]) -> tuple[float, ...]:
    """Five quantiles of logit p from the histogram (linear within bins), rounded to 0.5."""
    counts = np.asarray(case_mix, dtype=np.float64)
    edges = np.concatenate([[-5.5], _EDGES, [5.5]])  # tails closed half a unit out
    cdf = np.concatenate([[0.0], np.cumsum(counts) / counts.sum()])
    q = np.interp(_LEVELS, cdf, edges)
    return tuple(float(v) for v in np.round(q * 2) / 2)


# Simulated thresholds by (rounded case mix, target); shared by every model in the process.
_CACHE: dict[tuple[tuple[float, ...], int], float] = {}
_CACHE_SIZE = 512


def _simulate(key: tuple[float, ...], target_arl0: int) -> float:
    pool = 1.0 / (1.0 + np.exp(-np.interp(_POOL_LEVELS, _LEVELS, key)))
    per_chart = 2 * target_arl0
    return max(
        cusum_threshold_by_simulation(
            pool, target_arl0=per_chart, r_a=r_a, n_sims=_SIMS, seed=0, max_run=3 * per_chart
        ).h
        for r_a in RiskAdjustedCusum().r_a
    )


def assign_thresholds(tracks: list[Track], *, target_arl0: int) -> list[Track]:
    """Give frozen tracks without a threshold one; at most two new simulations per call
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


__all__ = ["CASE_MIX_ROWS", "SIMULATIONS_PER_RUN", "Track", "assign_thresholds", "update"]
