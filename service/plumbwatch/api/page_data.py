"""Gathers what the pages show: plain dicts and numbers for ``plumbwatch.web``.

Everything derived from stored records and sketches is cached by the id of the
evaluation it belongs to (see ``page_cache``): records never change once
committed, and the sketches of a window change only with the next run. A page
view therefore costs a few small queries plus the work for runs it has not seen.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import sqlalchemy as sa

from plumbwatch.api import alerts_source
from plumbwatch.api.page_cache import PageCache
from plumbwatch.errors import PlumbwatchError
from plumbwatch.evaluate.cohorts import DAY_US
from plumbwatch.evaluate.ranges import range_metrics
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.corp import reliability_curve_from_sketch
from plumbwatch.stats.reliability_bins import (
    binned_reliability_from_sketch,
    forecast_histogram_from_sketch,
    forecast_quantile_from_sketch,
)
from plumbwatch.store import history
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.models import MonitoredModel
from plumbwatch.store.sketches import Bucket, empty_sketch
from plumbwatch.timefmt import from_micros, parse_instant, to_micros
from plumbwatch.web.views import evidence_of

HISTORY_DAYS = 90
HISTORY_POINTS = 120
TREND_FIELDS = (
    "log_loss",
    "ece",
    "oe_ratio",
    "oe_ratio_low",
    "oe_ratio_high",
    "log_evidence",
    "log_threshold",
    "n",
)
# Axis ends for a zoomed reliability diagram (rare events): the smallest that holds
# 99.5 % of the forecasts.
_ZOOMS = (0.02, 0.05, 0.1, 0.2, 0.3, 0.5)
_BAND_LEVEL, _BAND_RESAMPLES = 0.9, 200


def _us(text: Any) -> int | None:
    try:
        return to_micros(parse_instant(text))
    except (TypeError, ValueError):
        return None


def _plain(x: Any) -> float | None:
    return float(x) if x is not None and math.isfinite(float(x)) else None


@dataclass(frozen=True)
class TrendPoint:
    """The trend figures of every across-versions slice entry of one record."""

    as_of: str
    index: dict[tuple[str, str], int]  # (window, slice) -> row of values
    values: np.ndarray  # rows x TREND_FIELDS, NaN for null

    def get(self, window: str, slice_name: str) -> dict[str, float | None] | None:
        row = self.index.get((window, slice_name))
        if row is None:
            return None
        return {f: _plain(v) for f, v in zip(TREND_FIELDS, self.values[row], strict=True)}


_INDEXES = PageCache(max_items=256)  # equal slice lists share one index


def trend_point(record: dict[str, Any]) -> TrendPoint:
    index: dict[tuple[str, str], int] = {}
    rows: list[list[float]] = []
    for w in record.get("windows") or []:
        for s in w.get("slices") or []:
            if s.get("version") is not None:
                continue
            metrics = dict(s.get("metrics") or {})
            metrics.update({k: v for k, v in evidence_of(record, s).items() if v is not None})
            index[(w.get("window"), s.get("slice"))] = len(rows)
            rows.append(
                [
                    float(v) if isinstance(v, int | float) and not isinstance(v, bool) else math.nan
                    for v in (metrics.get(f) for f in TREND_FIELDS)
                ]
            )
    values = np.array(rows, dtype=np.float64).reshape(len(rows), len(TREND_FIELDS))
    keys = tuple(index)
    shared = _INDEXES.get_or_compute(keys, lambda: index)
    return TrendPoint(str(record.get("as_of")), shared, values)


class Gatherer:
    """Reads for the pages, with three caches sized for what they hold: parsed latest
    records (large), trend points of past runs (small, many), and per-slice figures
    and charts (large, few)."""

    def __init__(self) -> None:
        self.records = PageCache(max_items=64)
        self.trends = PageCache(max_items=4000)
        self.cache = PageCache(max_items=64)

    # -- records -------------------------------------------------------------------

    def latest(
        self, conn: sa.Connection, model: MonitoredModel
    ) -> tuple[int, dict[str, Any]] | None:
        found = history.latest_id(conn, model_id=model.id)
        if found is None:
            return None
        eid = found[0]
        record = self.records.get_or_compute(eid, lambda: history.records_by_id(conn, [eid])[eid])
        return eid, record

    def trend(
        self, conn: sa.Connection, model: MonitoredModel, record: dict[str, Any]
    ) -> list[TrendPoint]:
        """Trend figures of at most HISTORY_POINTS runs over the HISTORY_DAYS before the
        record's as_of (the last run of each time slot)."""
        since = (_us(record.get("as_of")) or 0) - HISTORY_DAYS * DAY_US
        slot = max(HISTORY_DAYS * DAY_US // HISTORY_POINTS, 1)
        ids = history.thinned_ids(conn, model_id=model.id, since_us=since, slot_us=slot)
        points: dict[int, TrendPoint] = {}
        missing = []
        for eid, _ in ids:
            found = self.trends.get(eid)
            if found is None:
                missing.append(eid)
            else:
                points[eid] = found
        for start in range(0, len(missing), 50):
            for eid, record in history.records_by_id(conn, missing[start : start + 50]).items():
                points[eid] = trend_point(record)
                self.trends.put(eid, points[eid])
        return [points[eid] for eid, _ in ids if eid in points]

    # -- baseline ------------------------------------------------------------------

    def baseline(
        self,
        conn: sa.Connection,
        model: MonitoredModel,
        eid: int,
        record: dict[str, Any],
        version: str | None,
    ) -> dict[str, Any] | None:
        return self.cache.get_or_compute(
            ("baseline", eid), lambda: _baseline(conn, model, record, version)
        )

    # -- figures from sketches -----------------------------------------------------

    def figures(
        self,
        conn: sa.Connection,
        model: MonitoredModel,
        eid: int,
        record: dict[str, Any],
        slice_name: str,
        baseline: dict[str, Any] | None,
    ) -> dict[str, Any]:
        return self.cache.get_or_compute(
            ("figures", eid, slice_name),
            lambda: _figures(conn, model, record, slice_name, baseline),
        )

    # -- alerts --------------------------------------------------------------------

    @staticmethod
    def alerts(
        conn: sa.Connection,
        *,
        model_id: int | None = None,
        states: Iterable[str] = ("active", "acknowledged", "shelved", "cleared"),
        recent_cleared: int = 50,
        page: int = 500,
        most: int = 10_000,
    ) -> list[dict[str, Any]]:
        """Alerts by state, newest first; of the cleared ones only the most recent."""
        out: list[dict[str, Any]] = []
        for state in states:
            found: list[dict[str, Any]] = []
            after = None
            while len(found) < most:
                batch = alerts_source.list_alerts(
                    conn, state=state, model_id=model_id, limit=page, after_id=after
                )
                found += batch
                if len(batch) < page:
                    break
                after = max(int(a["id"]) for a in batch)
            found.sort(key=lambda a: str(a.get("since") or a.get("raised_at") or ""), reverse=True)
            if state == "cleared":
                found.sort(key=lambda a: str(a.get("cleared_at") or ""), reverse=True)
                found = found[:recent_cleared]
            out += found
        return out


def _baseline_entry(
    model: MonitoredModel, record: dict[str, Any], version: str | None
) -> tuple[dict[str, Any], str | None] | None:
    block = record.get("baseline")
    if isinstance(block, dict):
        if "start" in block and "end" in block:
            return block, None
        if version is not None and isinstance(block.get(version), dict):
            return block[version], version
        keyed = [(k, v) for k, v in block.items() if isinstance(v, dict) and "start" in v]
        if keyed:
            return keyed[-1][1], keyed[-1][0]
    declared = model.declaration.baseline
    if declared is not None:
        return {"start": declared.start, "end": declared.end, "source": "declared"}, None
    return None


def _baseline(
    conn: sa.Connection, model: MonitoredModel, record: dict[str, Any], version: str | None
) -> dict[str, Any] | None:
    found = _baseline_entry(model, record, version)
    if found is None:
        return None
    entry, entry_version = found
    start_us, end_us = _us(entry.get("start")), _us(entry.get("end"))
    if start_us is None or end_us is None or start_us >= end_us:
        return None
    metrics = entry.get("metrics")
    if not isinstance(metrics, dict):
        try:
            _, metrics, _ = range_metrics(
                conn, model, start_us=start_us, end_us=end_us, version=entry_version
            )
        except PlumbwatchError:
            metrics = None
    return {
        "start": entry.get("start"),
        "end": entry.get("end"),
        "version": entry_version,
        "source": entry.get("source"),
        "metrics": metrics,
        "start_us": start_us,
        "end_us": end_us,
    }


def _zoom(sketch: Any) -> float:
    q = forecast_quantile_from_sketch(sketch, 0.995)
    return next((z for z in _ZOOMS if math.isfinite(q) and q <= z), 1.0)


def _reliability(sketch: Any, n: int, events: int) -> dict[str, Any]:
    upper = _zoom(sketch)
    bins = binned_reliability_from_sketch(sketch, n_bins=10, upper=upper)
    edges, counts = forecast_histogram_from_sketch(sketch, n_bins=20, upper=upper)
    try:
        curve = reliability_curve_from_sketch(
            sketch, level=_BAND_LEVEL, n_resamples=_BAND_RESAMPLES, seed=0
        )
        curve_data: dict[str, Any] | None = {
            "forecast": curve.forecast.tolist(),
            "fitted": curve.fitted.tolist(),
            "band_low": curve.band_low.tolist(),
            "band_high": curve.band_high.tolist(),
            "level": curve.level,
        }
    except Undefined:
        curve_data = None
    return {
        "n": n,
        "events": events,
        "upper": upper,
        "bins": [
            {
                "low": float(bins.low[k]),
                "high": float(bins.high[k]),
                "count": float(bins.count[k]),
                "events": float(bins.events[k]),
                "mean_predicted": float(bins.mean_predicted[k]),
                "observed_rate": float(bins.observed_rate[k]),
                "ci_low": float(bins.ci_low[k]),
                "ci_high": float(bins.ci_high[k]),
            }
            for k in range(bins.count.size)
        ],
        "curve": curve_data,
        "histogram": {"edges": edges.tolist(), "counts": counts.tolist()},
    }


def _figures(
    conn: sa.Connection,
    model: MonitoredModel,
    record: dict[str, Any],
    slice_name: str,
    baseline: dict[str, Any] | None,
) -> dict[str, Any]:
    """Reliability per window, the score distribution against the baseline, and label
    coverage per cohort day, from the sketches the record was computed from."""
    k = len(model.classes)
    windows = []
    for w in record.get("windows") or []:
        start, end = _us(w.get("start")), _us(w.get("end"))
        if start is not None and end is not None:
            windows.append((str(w.get("window")), start // DAY_US, end // DAY_US))
    out: dict[str, Any] = {"reliability": {}, "distribution": None, "coverage": []}
    if not windows:
        return out
    day_from = min(a for _, a, _ in windows)
    day_to = max(b for _, _, b in windows)
    buckets = store_sketches.load_buckets(
        conn,
        model_id=model.id,
        day_from=day_from,
        day_to=day_to,
        slice_name=slice_name,
        n_classes=k,
    )
    by_day: dict[int, Bucket] = {}
    for (_, day, _), bucket in buckets.items():
        by_day[day] = by_day[day] + bucket if day in by_day else bucket
    sums = {}
    for name, first_day, end_day in windows:
        total = Bucket(empty_sketch(k))
        for day in range(first_day, end_day):
            if day in by_day:
                total = total + by_day[day]
        sums[name] = total
        if k:
            out["reliability"][name] = {
                "why": "Reliability diagrams are drawn for binary models; "
                "see the per-class metrics in the status JSON."
            }
        elif total.sketch.n <= 0:
            out["reliability"][name] = None
        else:
            out["reliability"][name] = _reliability(
                total.sketch, round(total.sketch.n), round(total.sketch.events)
            )
    as_of_day = (_us(record.get("as_of")) or 0) // DAY_US
    coverage = []
    for day in range(day_from, day_to):
        found = by_day.get(day)
        if found is None or found.matured == 0:
            continue
        coverage.append(
            {
                "day": day,
                "date": from_micros(day * DAY_US).strftime("%Y-%m-%d"),
                "age_days": as_of_day - day,
                "rows": found.matured,
                "coverage": (found.matured - found.unlabelled - found.late) / found.matured,
            }
        )
    out["coverage"] = coverage
    first = windows[0][0]
    if not k and sums[first].sketch.n > 0:
        upper = _zoom(sums[first].sketch)
        edges, current = forecast_histogram_from_sketch(sums[first].sketch, n_bins=20, upper=upper)
        dist: dict[str, Any] = {
            "window": first,
            "edges": edges.tolist(),
            "current": current.tolist(),
        }
        if baseline is not None:
            base = store_sketches.load_buckets(
                conn,
                model_id=model.id,
                day_from=baseline["start_us"] // DAY_US,
                day_to=-(-baseline["end_us"] // DAY_US),
                slice_name=slice_name,
                n_classes=k,
            )
            chosen = [b for (v, _, _), b in base.items() if baseline.get("version") in (None, v)]
            if chosen and sum(b.sketch.n for b in chosen) > 0:
                total = chosen[0]
                for b in chosen[1:]:
                    total = total + b
                dist["baseline"] = forecast_histogram_from_sketch(
                    total.sketch, n_bins=20, upper=upper
                )[1].tolist()
                dist["baseline_start"], dist["baseline_end"] = baseline["start"], baseline["end"]
        out["distribution"] = dist
    return out
