"""The latest evaluation of every model as OpenMetrics families.

Per model, window and slice entry: gauges named ``plumbwatch_slice_<metric>``
with labels ``model``, ``window``, ``slice`` and ``version`` (empty: across
versions), and a ``plumbwatch_slice_health`` state set. Cardinality is bounded:
at most ``metrics_slice_cap`` entries per model and window, overall first, then
the least healthy, then the most evidence; ``plumbwatch_model_slices`` and
``plumbwatch_model_slices_exported`` say how many were left out. A null metric
has no sample (OpenMetrics has no null, and NaN would read as a value).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from typing import Any, TypeGuard

from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    Metric,
    StateSetMetricFamily,
)

from plumbwatch.timefmt import parse_instant, to_micros
from plumbwatch.web.palette import HEALTH_ORDER, health_rank
from plumbwatch.web.views import evidence_of

# (JSON metric name, OpenMetrics name suffix, help text)
SLICE_METRICS = (
    ("n", "rows", "matured, labelled rows in the window"),
    ("events", "events", "rows with outcome 1"),
    ("label_coverage", "label_coverage", "share of matured rows with an outcome"),
    ("log_loss", "log_loss", "mean log loss, nats per row"),
    ("brier", "brier", "Brier score"),
    ("ece", "ece", "expected calibration error, 10 equal-width bins"),
    ("ece_debiased", "ece_debiased", "debiased L2 calibration error (Kumar et al.)"),
    ("oe_ratio", "oe_ratio", "observed over expected events"),
    ("oe_ratio_low", "oe_ratio_low", "O/E, lower 95 % limit"),
    ("oe_ratio_high", "oe_ratio_high", "O/E, upper 95 % limit"),
    ("calibration_slope", "calibration_slope", "calibration slope (Cox)"),
    ("calibration_intercept", "calibration_intercept", "calibration-in-the-large"),
    ("auroc", "auroc", "area under the ROC curve"),
    ("psi", "psi", "population stability index against the baseline"),
    ("ks_statistic", "ks_statistic", "Kolmogorov-Smirnov statistic against the baseline"),
    ("log_evidence", "log_evidence", "log e-value of miscalibration, nats"),
    ("log_threshold", "log_threshold", "log of the paging threshold K/alpha, nats"),
)
_LABELS = ["model", "window", "slice", "version"]


def _seconds(text: Any) -> float | None:
    try:
        return to_micros(parse_instant(text)) / 1e6
    except (TypeError, ValueError):
        return None


def _number(x: Any) -> TypeGuard[int | float]:
    return isinstance(x, int | float) and not isinstance(x, bool) and x == x


def exported_entries(
    record: Mapping[str, Any], window: Mapping[str, Any], cap: int
) -> list[Mapping[str, Any]]:
    """The slice entries of a window that /metrics exports, in order."""
    entries = list(window.get("slices") or [])

    def order(s: Mapping[str, Any]) -> tuple[Any, ...]:
        ev = evidence_of(record, s).get("log_evidence")
        return (
            s.get("slice") != "overall",
            s.get("version") is not None,
            health_rank(s.get("health")),
            -(float(ev) if _number(ev) else float("-inf")),
            s.get("slice") or "",
            s.get("version") or "",
        )

    return sorted(entries, key=order)[:cap]


def families(
    records: Sequence[tuple[str, Mapping[str, Any] | None]],
    *,
    slice_cap: int,
    active_alerts: Mapping[str, int],
    deliveries: Mapping[str, int] | None,
) -> list[Metric]:
    gauges = {
        name: GaugeMetricFamily(f"plumbwatch_slice_{suffix}", doc, labels=_LABELS)
        for name, suffix, doc in SLICE_METRICS
    }
    health = StateSetMetricFamily(
        "plumbwatch_slice_health", "health of the slice entry", labels=_LABELS
    )
    model_health = StateSetMetricFamily(
        "plumbwatch_model_health", "model health (its worst slice's)", labels=["model"]
    )
    evaluated = GaugeMetricFamily(
        "plumbwatch_model_last_evaluation_timestamp_seconds",
        "when the latest evaluation ran",
        labels=["model"],
    )
    as_of = GaugeMetricFamily(
        "plumbwatch_model_as_of_timestamp_seconds",
        "the as_of instant of the latest evaluation",
        labels=["model"],
    )
    alerts = GaugeMetricFamily(
        "plumbwatch_model_active_alerts", "alerts in state active", labels=["model"]
    )
    slices = GaugeMetricFamily(
        "plumbwatch_model_slices", "slice entries in the window", labels=["model", "window"]
    )
    exported = GaugeMetricFamily(
        "plumbwatch_model_slices_exported",
        "slice entries exported here (metrics_slice_cap)",
        labels=["model", "window"],
    )
    for model, record in records:
        alerts.add_metric([model], active_alerts.get(model, 0))
        if not record:
            continue
        state = record.get("health")
        model_health.add_metric([model], {s: s == state for s in HEALTH_ORDER})
        for family, field in ((evaluated, "evaluated_at"), (as_of, "as_of")):
            value = _seconds(record.get(field))
            if value is not None:
                family.add_metric([model], value)
        for w in record.get("windows") or []:
            name = str(w.get("window"))
            chosen = exported_entries(record, w, slice_cap)
            slices.add_metric([model, name], len(w.get("slices") or []))
            exported.add_metric([model, name], len(chosen))
            for s in chosen:
                labels = [model, name, str(s.get("slice")), s.get("version") or ""]
                metrics = {**(s.get("metrics") or {})}
                metrics.update({k: v for k, v in evidence_of(record, s).items() if v is not None})
                for metric, family in gauges.items():
                    if _number(metrics.get(metric)):
                        family.add_metric(labels, float(metrics[metric]))
                health.add_metric(labels, {h: h == s.get("health") for h in HEALTH_ORDER})
    out: list[Metric] = [model_health, evaluated, as_of, alerts, slices, exported, health]
    out += list(gauges.values())
    if deliveries is not None:
        attempts = CounterMetricFamily(
            "plumbwatch_delivery_attempts", "alert delivery attempts, all servers"
        )
        attempts.add_metric([], deliveries.get("attempts", 0))
        failures = CounterMetricFamily(
            "plumbwatch_delivery_failures", "alert deliveries that gave up, all servers"
        )
        failures.add_metric([], deliveries.get("failed", 0))
        queue = GaugeMetricFamily(
            "plumbwatch_deliveries", "alert deliveries by state", labels=["state"]
        )
        for key in ("pending", "delivered", "failed"):
            queue.add_metric([key], deliveries.get(key, 0))
        out += [attempts, failures, queue]
    return out


class Snapshot:
    """A collector that yields families gathered beforehand."""

    def __init__(self, collected: Iterable[Metric]) -> None:
        self._collected = list(collected)

    def collect(self) -> Iterator[Metric]:
        return iter(self._collected)
