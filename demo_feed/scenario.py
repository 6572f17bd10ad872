"""The fictional parcel courier: every parcel of every day, from a fixed seed.

A regional courier scores each parcel at dispatch with the probability that it
arrives late (model ``late-delivery``); the outcome comes in on delivery, one
to six and a half days later. Parcels with a declared value are also scored for
the chance of a damage claim within 30 days (model ``damage-claim``); only
claims are ever reported, so a missing outcome means no claim. All names and
numbers are invented.

Both models are calibrated by construction (the outcome is drawn with the
model's own probability) except in one place: from day ``STORM_START`` a storm
season lifts lateness in the ``north-coast`` region, reaching a shift of
``STORM_SHIFT`` on the logit scale by ``STORM_FULL`` and staying there (the
season is still on when the history ends, so the live feed keeps drifting too).

Meanwhile lateness eases slightly elsewhere, a little more than the model
expects (``EASING_SHIFT``), which offsets the storm in the overall figures.

What that does, measured from the generated rows by
``tests/demo_feed/test_scenario.py`` (default seed, 2,000 parcels a day,
about 168,600 parcels in 91 days, 67,200 of them insured, 2,680 claims):

- north-coast, the last 7 cohort days matured at the end of the history: 793
  parcels, 279 late; late rate 0.352 against 0.164 predicted, log O/E 0.76
  (materiality tolerance 0.1), ECE 0.19 (tolerance 0.03);
- overall: the late rate goes from 0.158 before the storm to 0.161 during it
  (0.156 and 0.157 predicted); no 7-day window of the history has |log O/E|
  above 0.071 or ECE above 0.012, so only per-slice monitoring sees the storm;
- a mixture e-process (METHODS.md section 7.2) fed the north-coast rows in
  maturity order crosses the paging threshold log(K/alpha) = 8.7 nats (K = 60
  slices, alpha = 0.01) on the rows of day 61, nine days into the storm; they
  mature a week later, around day 68 of the 90 replayed. No other region, nor
  the overall slice, crosses.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import cached_property
from typing import Any

import numpy as np
from numpy.typing import NDArray

SEED = 20_261_130
HISTORY_DAYS = 90
PARCELS_PER_DAY = 2_000
DAY_S = 86_400

LATE_MODEL = "late-delivery"
CLAIM_MODEL = "damage-claim"
LATE_VERSION = "v7"
CLAIM_VERSION = "v2"

STORM_REGION = "north-coast"
# The storm is placed from the end of the history, so a shorter history (for a
# slower machine: ``--history-days``) still shows it: with 90 days it starts on
# day 52 (0 = the first day) and is at full strength from day 60.
STORM_DAYS_BEFORE_END = 38
STORM_RAMP_DAYS = 8
STORM_START = HISTORY_DAYS - STORM_DAYS_BEFORE_END
STORM_FULL = STORM_START + STORM_RAMP_DAYS
STORM_SHIFT = 1.1  # logit units: p 0.16 -> about 0.36 at full strength

# name, share of parcels, logit effect, its two depots (share 60/40) and their effects
REGIONS: tuple[tuple[str, float, float, tuple[tuple[str, float], ...]], ...] = (
    ("north-coast", 0.06, 0.10, (("NC-harbour", 0.00), ("NC-cliffside", 0.15))),
    ("south-coast", 0.14, 0.05, (("SC-bayfront", -0.05), ("SC-dunes", 0.10))),
    ("metro", 0.36, -0.15, (("ME-central", 0.00), ("ME-ringroad", 0.20))),
    ("river-valley", 0.22, 0.00, (("RV-millford", -0.10), ("RV-ferrygate", 0.05))),
    ("uplands", 0.22, 0.20, (("UP-ridge", 0.05), ("UP-moorside", 0.25))),
)
TIERS: tuple[tuple[str, float, float], ...] = (
    ("express", 0.20, -0.70),
    ("standard", 0.55, 0.00),
    ("economy", 0.25, 0.45),
)
# Monday first: parcels per weekday (relative) and the weekday's effect on lateness.
WEEKDAY_VOLUME = (1.15, 1.05, 1.00, 1.00, 1.10, 0.75, 0.45)
WEEKDAY_LOGIT = (0.15, 0.00, -0.05, 0.00, 0.10, 0.20, 0.25)
LATE_BASE = -2.0
# Meanwhile lateness eases a little everywhere else, a little more than the model
# expects; small per region (|log O/E| about 0.05, not material), it offsets the
# storm in the overall figures, which is what makes the storm easy to miss.
EASING_SHIFT = -0.05
CLAIM_BASE = -3.7
INSURED_SHARE = 0.4
LATE_HORIZON = "P7D"
CLAIM_HORIZON = "P30D"


def late_declaration() -> dict[str, Any]:
    return {
        "kind": "binary",
        "label_horizon": LATE_HORIZON,
        "missing_outcome": "wait",
        "segment_keys": ["region", "tier", "depot"],
        "windows": ["P7D", "P28D"],
        "description": "Probability that a parcel arrives late, scored at dispatch "
        "(fictional courier demo).",
    }


def claim_declaration() -> dict[str, Any]:
    return {
        "kind": "binary",
        "label_horizon": CLAIM_HORIZON,
        "missing_outcome": "negative",
        "segment_keys": ["region", "tier"],
        # Claims are rare (about 3 %): a week holds too few per region for a verdict.
        "windows": ["P28D"],
        "description": "Probability of a damage claim within 30 days of dispatch "
        "(fictional courier demo; no claim reported means none).",
    }


def storm_ramp(day: int, history_days: int = HISTORY_DAYS) -> float:
    """0 before the storm season, rising to 1 at full strength, then 1."""
    start = history_days - STORM_DAYS_BEFORE_END
    if day < start:
        return 0.0
    if day >= start + STORM_RAMP_DAYS:
        return 1.0
    return (day - start + 1) / (STORM_RAMP_DAYS + 1)


def storm_shift(day: int, history_days: int = HISTORY_DAYS) -> float:
    """Logit shift of lateness in the storm region on a day of the history."""
    return STORM_SHIFT * storm_ramp(day, history_days)


def _sigmoid(x: NDArray[np.float64]) -> NDArray[np.float64]:
    out: NDArray[np.float64] = 1.0 / (1.0 + np.exp(-x))
    return out


def _logit(p: NDArray[np.float64]) -> NDArray[np.float64]:
    out: NDArray[np.float64] = np.log(p) - np.log1p(-p)
    return out


def _iso(seconds: NDArray[np.int64]) -> list[str]:
    text = np.datetime_as_string(seconds.astype("datetime64[s]"), unit="s")
    return [t + "Z" for t in text.tolist()]


@dataclass(frozen=True)
class Day:
    """Every parcel dispatched on one day, as arrays (times in epoch seconds)."""

    index: int
    ids: list[str]
    dispatched: NDArray[np.int64]
    region: NDArray[np.int64]
    depot: NDArray[np.int64]  # index into the region's depots
    tier: NDArray[np.int64]
    p_late: NDArray[np.float64]
    late: NDArray[np.bool_]
    delivered: NDArray[np.int64]
    insured: NDArray[np.bool_]
    p_claim: NDArray[np.float64]
    claim: NDArray[np.bool_]
    claimed: NDArray[np.int64]

    def __len__(self) -> int:
        return len(self.ids)

    @cached_property
    def segments(self) -> list[dict[str, str]]:
        names = [
            {"region": r[0], "depot": r[3][d][0], "tier": TIERS[t][0]}
            for r, d, t in (
                (REGIONS[ri], di, ti)
                for ri, di, ti in zip(
                    self.region.tolist(), self.depot.tolist(), self.tier.tolist(), strict=True
                )
            )
        ]
        return names

    def late_predictions(self, mask: NDArray[np.bool_] | None = None) -> list[dict[str, Any]]:
        keep = np.ones(len(self), bool) if mask is None else mask
        at = _iso(self.dispatched[keep])
        idx = np.flatnonzero(keep).tolist()
        p = self.p_late[keep].tolist()
        return [
            {
                "id": self.ids[i],
                "predicted_at": t,
                "probability": q,
                "version": LATE_VERSION,
                "segments": self.segments[i],
            }
            for i, t, q in zip(idx, at, p, strict=True)
        ]

    def claim_predictions(self, mask: NDArray[np.bool_] | None = None) -> list[dict[str, Any]]:
        keep = self.insured if mask is None else self.insured & mask
        at = _iso(self.dispatched[keep])
        idx = np.flatnonzero(keep).tolist()
        p = self.p_claim[keep].tolist()
        return [
            {
                "id": self.ids[i],
                "predicted_at": t,
                "probability": q,
                "version": CLAIM_VERSION,
                "segments": {
                    "region": self.segments[i]["region"],
                    "tier": self.segments[i]["tier"],
                },
            }
            for i, t, q in zip(idx, at, p, strict=True)
        ]

    def late_outcomes(self, start: int, end: int) -> list[dict[str, Any]]:
        """Deliveries with ``start <= delivered < end`` (epoch seconds)."""
        keep = (self.delivered >= start) & (self.delivered < end)
        idx = np.flatnonzero(keep).tolist()
        at = _iso(self.delivered[keep])
        late = self.late[keep].astype(int).tolist()
        return [
            {"id": self.ids[i], "outcome": y, "observed_at": t}
            for i, y, t in zip(idx, late, at, strict=True)
        ]

    def claim_outcomes(self, start: int, end: int) -> list[dict[str, Any]]:
        """Claims filed with ``start <= claimed < end``; parcels without one send nothing."""
        keep = self.insured & self.claim & (self.claimed >= start) & (self.claimed < end)
        idx = np.flatnonzero(keep).tolist()
        at = _iso(self.claimed[keep])
        return [
            {"id": self.ids[i], "outcome": 1, "observed_at": t}
            for i, t in zip(idx, at, strict=True)
        ]


@dataclass(frozen=True)
class Scenario:
    """The courier's days from ``start`` (a UTC midnight, epoch seconds)."""

    start: int
    seed: int = SEED
    parcels_per_day: int = PARCELS_PER_DAY
    history_days: int = HISTORY_DAYS  # places the storm (see STORM_DAYS_BEFORE_END)

    @classmethod
    def ending_today(
        cls,
        now: datetime,
        *,
        history_days: int = HISTORY_DAYS,
        seed: int = SEED,
        parcels_per_day: int = PARCELS_PER_DAY,
    ) -> Scenario:
        """History of ``history_days`` whole days before today's UTC midnight."""
        midnight = now.astimezone(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
        first = midnight - timedelta(days=history_days)
        return cls(
            int(first.timestamp()),
            seed=seed,
            parcels_per_day=parcels_per_day,
            history_days=history_days,
        )

    def day_start(self, index: int) -> int:
        return self.start + index * DAY_S

    def day(self, index: int) -> Day:
        """Day ``index``; the same seed and index always give the same parcels."""
        rng = np.random.default_rng([self.seed, index])
        day_start = self.day_start(index)
        weekday = datetime.fromtimestamp(day_start, UTC).weekday()
        n = int(rng.poisson(self.parcels_per_day * WEEKDAY_VOLUME[weekday]))
        region = rng.choice(len(REGIONS), size=n, p=[r[1] for r in REGIONS])
        depot = (rng.random(n) < 0.4).astype(np.int64)  # 60/40 between a region's depots
        tier = rng.choice(len(TIERS), size=n, p=[t[1] for t in TIERS])
        # Dispatch between 06:00 and 21:00 UTC, whole seconds, in order.
        dispatched = day_start + np.sort(rng.integers(6 * 3600, 21 * 3600, size=n))
        region_logit = np.array([r[2] for r in REGIONS])[region]
        depot_logit = np.array([[d[1] for d in r[3]] for r in REGIONS])[region, depot]
        tier_logit = np.array([t[2] for t in TIERS])[tier]
        parcel = rng.normal(0.0, 0.7, size=n)  # what the model knows about the parcel
        z = LATE_BASE + region_logit + depot_logit + tier_logit + WEEKDAY_LOGIT[weekday] + parcel
        # The model's probability is what is sent (4 decimals); outcomes are drawn
        # from it, plus the storm where there is one, so calibration is exact elsewhere.
        p_late = np.clip(np.round(_sigmoid(z), 4), 0.0005, 0.9995)
        storm = np.array([r[0] == STORM_REGION for r in REGIONS])[region]
        ramp = storm_ramp(index, self.history_days)
        shift = np.where(storm, STORM_SHIFT * ramp, EASING_SHIFT * ramp)
        true_late = _sigmoid(_logit(p_late) + shift)
        late = rng.random(n) < true_late
        # On-time parcels arrive within about three days, late ones later; express faster.
        speed = np.where(tier == 0, 0.6, 1.0)
        days = np.where(late, rng.uniform(3.3, 6.6, n), rng.uniform(0.5, 3.2, n) * speed)
        delivered = dispatched + (days * DAY_S).astype(np.int64)

        insured = rng.random(n) < INSURED_SHARE
        fragile = rng.random(n) < 0.2
        claim_z = (
            CLAIM_BASE
            + np.array([-0.2, 0.0, 0.3])[tier]
            + 1.2 * fragile
            + rng.normal(0.0, 0.5, size=n)
        )
        p_claim = np.clip(np.round(_sigmoid(claim_z), 4), 0.0005, 0.9995)
        claim = rng.random(n) < p_claim
        claimed = delivered + (rng.uniform(0.5, 20.0, n) * DAY_S).astype(np.int64)

        stamp = datetime.fromtimestamp(day_start, UTC).strftime("%Y%m%d")
        ids = [f"pcl-{stamp}-{k:05d}" for k in range(n)]
        return Day(
            index,
            ids,
            dispatched.astype(np.int64),
            region.astype(np.int64),
            depot,
            tier.astype(np.int64),
            p_late,
            late,
            delivered.astype(np.int64),
            insured,
            p_claim,
            claim,
            claimed.astype(np.int64),
        )

    def days(self, first: int, last: int) -> Iterator[Day]:
        for index in range(first, last + 1):
            yield self.day(index)
