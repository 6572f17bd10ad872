"""Score drift against each version's baseline window, for matured and immature cohorts.

A shift in the score distribution is a leading indicator, not a calibration
verdict (METHODS.md §9): it can show before a single label of the cohort arrives.

Baseline (DESIGN.md "Reference"): the declared ``baseline`` dates (whole cohort
days from the day of ``start`` up to the day that holds ``end``, end exclusive, for
every version), or else, per version, the first matured window after the
version's first cohort day, as long as the model's first declared window (e.g.
seven days). Once that window has matured it is fixed (stored), so later
backfills cannot move it.

Histograms: matured cohorts use the sketch's per-bin counts on the fine
probability grid (rows in the sketch: matured and labelled, or counted 0 under
``missing_outcome = negative``); immature cohorts use their raw rows of the
current version, binned on the same grid. Multiclass models compare the
top-label confidence. PSI is taken over the baseline's deciles (fine bins grouped
at the reference quantiles), KS on the grid (its statistic a lower bound of the
exact one, within the largest one-bin share).

Threshold: PSI's null distribution for fixed bins is about ``(1/N + 1/M)
chi2_{B-1}`` (METHODS.md §9, from memory of Yurdakul's work, checked there by
simulation), so a fixed 0.25 means nothing for small windows (the null 95th
percentile is about 0.34 at N = M = 100) and flags trivial shifts for large
ones. ``psi_threshold`` is the larger of that null's 99th percentile and 0.1
(the common-practice bound of "little change"), and ``score_drift`` is
``psi > psi_threshold``.
"""

from __future__ import annotations

import math
from collections import defaultdict
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import sqlalchemy as sa

from plumbwatch.evaluate.cohorts import DAY_US, day_of
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.drift import ks_from_counts, psi_from_histograms
from plumbwatch.stats.grid import N_BINS, bin_index
from plumbwatch.store import evidence as store_evidence
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.sketches import Bucket, empty_sketch
from plumbwatch.store.tables import predictions
from plumbwatch.timefmt import format_instant, parse_instant, to_micros

PSI_ALPHA = 0.01
PSI_FLOOR = 0.1  # common practice: below 0.10 "little change" (METHODS.md §9)
PSI_BINS = 10


@dataclass
class Baselines:
    """Each version's baseline days and its summed buckets per slice."""

    days: dict[str, tuple[int, int]]
    source: str  # "declared" or "first_window"
    fixed_now: list[tuple[str, int, int]] = field(default_factory=list)
    buckets: dict[tuple[str, str], Bucket] = field(default_factory=dict)

    def record(self) -> dict[str, Any]:
        return {
            v: {
                "start": format_instant(a * DAY_US),
                "end": format_instant(b * DAY_US),
                "source": self.source,
            }
            for v, (a, b) in sorted(self.days.items())
        }


def current_version(
    conn: sa.Connection, *, model_id: int, as_of_us: int, max_id: int
) -> str | None:
    """The version of the latest prediction made at or before ``as_of``."""
    p = predictions.c
    return conn.execute(
        sa.select(p.version)
        .where(p.model_id == model_id, p.predicted_at_us <= as_of_us, p.id <= max_id)
        .order_by(p.predicted_at_us.desc(), p.id.desc())
        .limit(1)
    ).scalar()


def resolve_baselines(
    conn: sa.Connection,
    model: MonitoredModel,
    *,
    window_days: int,
    complete_day: int,
    touched: dict[tuple[str, int, str], Bucket],
    wanted: set[str],
) -> Baselines:
    """Baselines of every version with matured rows, and for the ``wanted`` versions
    their buckets summed per slice.

    ``complete_day``: the first day not yet complete (where windows end); ``touched``:
    the buckets this run changed, which are newer than the stored ones.
    """
    k = len(model.classes)
    declared = model.declaration.baseline
    firsts = store_evidence.first_days(conn, model_id=model.id)
    for version, day, _ in touched:
        firsts[version] = min(day, firsts.get(version, day))
    if declared is not None:
        span = (day_of(_micros(declared.start)), -(-_micros(declared.end) // DAY_US))
        out = Baselines(dict.fromkeys(firsts, span), "declared")
    else:
        fixed = store_evidence.load_baselines(conn, model_id=model.id)
        out = Baselines(dict(fixed), "first_window")
        for version, first in firsts.items():
            if version not in fixed and first + window_days <= complete_day:
                out.days[version] = (first, first + window_days)
                out.fixed_now.append((version, first, first + window_days))
    sums: dict[tuple[str, str], Bucket] = defaultdict(lambda: Bucket(empty_sketch(k)))
    # One read per distinct baseline span (versions share a span when it is declared).
    for lo, hi in sorted({out.days[v] for v in wanted if v in out.days}):
        found = store_sketches.load_buckets(
            conn, model_id=model.id, day_from=lo, day_to=hi, n_classes=k
        )
        found.update((key, b) for key, b in touched.items() if lo <= key[1] < hi)
        for (version, _, name), bucket in found.items():
            if version in wanted and out.days.get(version) == (lo, hi):
                sums[(version, name)] = sums[(version, name)] + bucket
    out.buckets = dict(sums)
    return out


def _micros(text: str) -> int:
    return to_micros(parse_instant(text))


def score_counts(sketch: Any) -> np.ndarray:
    """Per-grid-bin row counts of a binary sketch, or of a multiclass sketch's top label."""
    top = getattr(sketch, "top", None)
    return np.asarray((top if top is not None else sketch).count, dtype=np.float64)


def histogram(probabilities: list[float]) -> np.ndarray:
    """Per-grid-bin counts of raw probabilities."""
    if not probabilities:
        return np.zeros(N_BINS)
    return np.bincount(
        bin_index(np.asarray(probabilities, dtype=np.float64)), minlength=N_BINS
    ).astype(np.float64)


def drift(
    reference: np.ndarray | None, current: np.ndarray, *, missing: str = "no_baseline"
) -> tuple[dict[str, Any], dict[str, str], bool]:
    """``psi``, ``psi_threshold``, ``ks_statistic``, ``ks_p_value``; reasons for nulls;
    whether PSI exceeds its threshold."""
    names = ("psi", "psi_threshold", "ks_statistic", "ks_p_value")
    metrics: dict[str, Any] = dict.fromkeys(names)
    if reference is None or reference.sum() <= 0:
        return metrics, dict.fromkeys(names, missing), False
    if current.sum() <= 0:
        return metrics, dict.fromkeys(names, "no_rows"), False
    reasons: dict[str, str] = {}
    exceeds = False
    try:
        result = psi_from_histograms(reference, current, n_bins=PSI_BINS, alpha=PSI_ALPHA)
        threshold = max(result.null_quantile, PSI_FLOOR)
        metrics["psi"] = _finite(result.psi)
        metrics["psi_threshold"] = threshold
        exceeds = result.psi > threshold
    except Undefined as exc:
        reasons["psi"] = reasons["psi_threshold"] = exc.reason
    try:
        ks = ks_from_counts(reference, current)
        metrics["ks_statistic"] = ks.statistic
        metrics["ks_p_value"] = ks.p_value
    except Undefined as exc:
        reasons["ks_statistic"] = reasons["ks_p_value"] = exc.reason
    return metrics, reasons, exceeds


def _finite(value: float) -> float | None:
    return value if math.isfinite(value) else None


__all__ = [
    "Baselines",
    "current_version",
    "drift",
    "histogram",
    "resolve_baselines",
    "score_counts",
]
