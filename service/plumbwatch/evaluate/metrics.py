"""Metrics of one slice from its summed bucket: the names of DESIGN.md "Metric names"."""

from __future__ import annotations

from typing import Any

from plumbwatch.evaluate import multiclass
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.smooth import smooth_ece_from_sketch
from plumbwatch.stats.summary import binary_metrics
from plumbwatch.store.sketches import Bucket

# An evaluation run fills these (score drift against the version's baseline, the
# slice's evidence stream: evaluate/assess.py); elsewhere (metrics for any range)
# they are null with this reason, never a made-up number.
_RUN_ONLY = (
    "psi",
    "psi_threshold",
    "ks_statistic",
    "ks_p_value",
    "log_evidence",
    "log_threshold",
)


def slice_metrics(
    bucket: Bucket, classes: list[str] | None = None
) -> tuple[dict[str, Any], dict[str, str]]:
    """Binary metrics, or with ``classes`` the multiclass ones, plus the counts."""
    if classes:
        metrics, reasons = multiclass.slice_metrics(bucket.sketch, classes)
        _counts(metrics, reasons, bucket)
        return metrics, reasons
    values, reasons = binary_metrics(bucket.sketch)
    metrics = {k: (float(v) if v is not None else None) for k, v in values.items()}
    metrics["n"] = round(bucket.sketch.n)
    metrics["events"] = round(bucket.sketch.events)
    _counts(metrics, reasons, bucket)
    if metrics["n"] > 0:
        try:
            metrics["ece_smooth"] = float(smooth_ece_from_sketch(bucket.sketch).value)
        except Undefined as exc:
            metrics["ece_smooth"] = None
            reasons["ece_smooth"] = exc.reason
    else:
        metrics["ece_smooth"] = None
        reasons["ece_smooth"] = "no_rows"
    if metrics.get("hl_df") is not None:
        metrics["hl_df"] = int(metrics["hl_df"])
    for name in _RUN_ONLY:
        metrics[name] = None
        reasons[name] = "evaluation_runs_only"
    return metrics, reasons


def _counts(metrics: dict[str, Any], reasons: dict[str, str], bucket: Bucket) -> None:
    metrics["late"] = bucket.late
    metrics["label_coverage"] = (
        (bucket.matured - bucket.unlabelled - bucket.late) / bucket.matured
        if bucket.matured
        else None
    )
    if bucket.matured == 0:
        reasons["label_coverage"] = "no_matured_rows"


def health(bucket: Bucket, *, min_events: int, multiclass_model: bool = False) -> str:
    """``awaiting_labels`` with no matured rows, ``insufficient_data`` with fewer than
    ``min_events`` events or non-events (100 by default: a common rule of thumb,
    Vergouwe et al. 2005; METHODS.md section 12), else ``ok``. Multiclass: correct
    and incorrect top-label rows stand for events and non-events."""
    if bucket.matured == 0 or round(bucket.sketch.n) == 0:
        return "awaiting_labels"
    if multiclass_model:
        hits, misses = multiclass.verdict_counts(bucket.sketch)
    else:
        hits = round(bucket.sketch.events)
        misses = round(bucket.sketch.n) - hits
    if min(hits, misses) < min_events:
        return "insufficient_data"
    return "ok"


# Worst first when a model's health is its worst slice's: an alarm outranks a verdict,
# a verdict outranks "not enough data yet".
HEALTH_ORDER = ("drifting", "watch", "ok", "insufficient_data", "awaiting_labels")


def worst(states: list[str]) -> str:
    if not states:
        return "awaiting_labels"
    return min(states, key=HEALTH_ORDER.index)
