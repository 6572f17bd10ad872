"""Multiclass models: sketches per bucket and the metrics of a slice.

A multiclass bucket holds a :class:`~plumbwatch.stats.multiclass.MulticlassSketch`
(one-vs-rest binary sketches per class, a top-label sketch, and the sums of
multiclass log loss and Brier), so the same bucket arithmetic serves both kinds.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from plumbwatch.stats.multiclass import MulticlassSketch, multiclass_metrics
from plumbwatch.stats.summary import binary_metrics


def grouped(
    groups: Any, probs: Any, ys: Any, n_groups: int, n_classes: int
) -> list[MulticlassSketch | None]:
    """One sketch per group index (None where a group has no rows)."""
    out: list[MulticlassSketch | None] = [None] * n_groups
    g = np.asarray(groups, dtype=np.intp)
    if not g.size:
        return out
    p = np.asarray(probs, dtype=np.float64).reshape(g.size, n_classes)
    y = np.asarray(ys, dtype=np.int64)
    order = np.argsort(g, kind="stable")
    g, p, y = g[order], p[order], y[order]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    ends = np.r_[starts[1:], g.size]
    for a, b in zip(starts, ends, strict=True):
        out[int(g[a])] = MulticlassSketch.from_arrays(y[a:b], p[a:b])
    return out


def slice_metrics(
    sketch: MulticlassSketch, classes: list[str]
) -> tuple[dict[str, Any], dict[str, str]]:
    """``n``, ``events_by_class``, ``top_label_correct`` (rows whose top class was the
    outcome), ``log_loss``, ``brier`` (summed over classes, range [0, 2]),
    ``ece_top_label``, ``ece_classwise`` (15 equal-width bins), and each binary metric
    per class as ``class:<name>:<metric>`` (one-vs-rest)."""
    values, reasons = multiclass_metrics(sketch, n_bins=15)
    metrics: dict[str, Any] = dict(values)
    metrics["n"] = round(sketch.n)
    metrics["events_by_class"] = {
        c: round(e) for c, e in zip(classes, sketch.events_by_class, strict=True)
    }
    # Correct and incorrect top-label rows play the part of events and non-events
    # when a rule asks for a minimum (see verdict_counts).
    metrics["top_label_correct"] = verdict_counts(sketch)[0]
    for name, per in zip(classes, sketch.per_class, strict=True):
        per_values, per_reasons = binary_metrics(per)
        for metric, value in per_values.items():
            key = f"class:{name}:{metric}"
            metrics[key] = float(value) if value is not None else None
            if metric in per_reasons:
                reasons[key] = per_reasons[metric]
    return metrics, reasons


def verdict_counts(sketch: MulticlassSketch) -> tuple[int, int]:
    """(correct, incorrect) top-label rows: a verdict on top-label calibration needs
    both in good number, as a binary verdict needs events and non-events."""
    correct = round(sketch.top.events)
    return correct, round(sketch.top.n) - correct
