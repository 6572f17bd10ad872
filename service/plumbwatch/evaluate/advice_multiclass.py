"""Recalibration advice for multiclass models: temperature scaling.

A temperature needs whole probability rows, which the per-class sketches do not
keep, so this reads the window's matured, labelled raw rows of the current
version (the most recent ``MAX_ROWS`` of them). As for binary models
(``evaluate/advice.py``) the gain is cross-fitted by blocks of cohort days, and:

* ``retrain`` when discrimination fell: the mean one-vs-rest AUROC over classes
  (from the sketches, on the grid) is lower than in the baseline window by more than
  1.96 standard errors, the per-class Hanley–McNeil errors combined as if the
  classes were independent (an approximation: they are not);
* ``recalibrate`` when the gain's interval lies above zero and the top-label ECE
  reaches ``materiality_ece``;
* ``no action`` otherwise.

There are no knots: the map is ``q_k ∝ p_k^(1/T)`` with ``params = [T]``.
"""

from __future__ import annotations

import math
from collections import defaultdict
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa

from plumbwatch.evaluate.advice import auroc_se
from plumbwatch.evaluate.cohorts import Window, day_of
from plumbwatch.evaluate.slices import SliceSpec, ValueCap
from plumbwatch.evaluate.verdicts import Tolerances
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.discrimination import roc_auc_from_sketch
from plumbwatch.stats.multiclass import MulticlassSketch, top_label_ece
from plumbwatch.stats.recalibration import fit_temperature
from plumbwatch.store.sketches import Bucket
from plumbwatch.store.tables import outcomes, predictions
from plumbwatch.timefmt import format_instant

MAX_ROWS = 200_000
MAX_FOLDS = 5
_Z = 1.96
_EPS = 1e-12


def _rows(
    conn: sa.Connection, *, model_id: int, version: str, window: Window, horizon_us: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str | None]]:
    p, o = predictions.c, outcomes.c
    query = (
        sa.select(p.predicted_at_us, p.probabilities, p.segments, o.outcome)
        .select_from(predictions.join(outcomes, o.prediction_id == p.id))
        .where(
            p.model_id == model_id,
            p.version == version,
            p.predicted_at_us >= window.start_us,
            p.predicted_at_us < window.end_us,
            o.observed_at_us <= p.predicted_at_us + horizon_us,
        )
        .order_by(p.predicted_at_us.desc())
        .limit(MAX_ROWS)
    )
    found = conn.execute(query).all()
    days = np.array([day_of(r[0]) for r in found], dtype=np.int64)
    probs = np.array([orjson.loads(r[1]) for r in found], dtype=np.float64)
    y = np.array([r[3] for r in found], dtype=np.int64)
    return days, probs, y, [r[2] for r in found]


def _nll(y: np.ndarray, q: np.ndarray) -> np.ndarray:
    out: np.ndarray = -np.log(np.clip(q[np.arange(y.size), y], _EPS, 1.0))
    return out


def _gain(days: np.ndarray, probs: np.ndarray, y: np.ndarray) -> dict[str, Any]:
    unique = np.unique(days)
    if unique.size < 2:
        raise Undefined("too_few_days", "cross-fitting needs at least two cohort days")
    n_folds = min(MAX_FOLDS, unique.size)
    fold = (np.searchsorted(unique, days) * n_folds) // unique.size
    base = _nll(y, probs)
    d = np.empty(y.size)
    for f in range(n_folds):
        test = fold == f
        fitted = fit_temperature(y[~test], probs[~test])
        d[test] = base[test] - _nll(y[test], fitted.apply(probs[test]))
    full = fit_temperature(y, probs)
    mean, se = float(d.mean()), float(d.std(ddof=1) / math.sqrt(d.size))
    return {
        "method": "temperature",
        "gain_log_loss": mean,
        "gain_interval": [mean - _Z * se, mean + _Z * se],
        "in_sample_gain": full.nll_before - full.nll_after,
        "params": [full.temperature],
    }


def _macro_auroc(sketch: MulticlassSketch) -> tuple[float, float] | None:
    values, variances = [], []
    for s in sketch.per_class:
        try:
            a = roc_auc_from_sketch(s).value
        except Undefined:
            return None
        values.append(a)
        variances.append(auroc_se(a, s.events, s.n - s.events) ** 2)
    k = len(values)
    return sum(values) / k, math.sqrt(sum(variances)) / k


def advise_multiclass(
    conn: sa.Connection,
    *,
    model_id: int,
    version: str,
    window: Window,
    horizon_us: int,
    spec: SliceSpec,
    cap: ValueCap,
    window_buckets: dict[str, Bucket],
    baselines: dict[tuple[str, str], Bucket],
    enough: set[str],
    tol: Tolerances,
) -> dict[str, Any] | None:
    """The record's ``recalibration`` object for a multiclass model (None without advice)."""
    days, probs, y, segments = _rows(
        conn, model_id=model_id, version=version, window=window, horizon_us=horizon_us
    )
    if not y.size:
        return None
    members: dict[str, list[int]] = defaultdict(list)
    names: dict[str | None, list[str]] = {}
    for i, seg in enumerate(segments):
        found = names.get(seg)
        if found is None:
            found = names[seg] = spec.names(orjson.loads(seg) if seg else {}, cap)
        for name in found:
            if name in enough:
                members[name].append(i)
    span = {
        "window": window.name,
        "start": format_instant(window.start_us),
        "end": format_instant(window.end_us),
    }
    entries = {}
    for name, rows in members.items():
        idx = np.asarray(rows)
        try:
            gain = _gain(days[idx], probs[idx], y[idx])
        except Undefined:
            continue
        ece = top_label_ece(y[idx], probs[idx], n_bins=15)
        now = _macro_auroc(window_buckets[name].sketch) if name in window_buckets else None
        base_bucket = baselines.get((version, name))
        base = _macro_auroc(base_bucket.sketch) if base_bucket and base_bucket.sketch.n else None
        limit = _Z * math.hypot(now[1], base[1]) if now and base else None
        lo = gain["gain_interval"][0]
        if now and base and limit is not None and base[0] - now[0] > limit:
            word = "retrain"
            why = (
                f"Discrimination fell: mean one-vs-rest AUROC {now[0]:.3f} against "
                f"{base[0]:.3f} in the baseline window, beyond the {limit:.3f} sampling explains; "
                "retrain the model."
            )
        elif lo > 0 and ece >= tol.materiality_ece:
            word = "recalibrate"
            why = (
                f"Temperature {gain['params'][0]:.3f} cuts the log loss by "
                f"{gain['gain_log_loss']:.4f} nats per row (cross-fitted by cohort day) and the "
                f"top-label ECE is {ece:.3f}; apply it, then reset the evidence."
            )
        else:
            word, why = "no action", "No action: no material gain that cross-fitting confirms."
        entries[name] = {
            "slice": name,
            "version": version,
            **gain,
            "n": int(idx.size),
            "knots": None,
            "verdict": word,
            "explanation": why,
            "auroc": now[0] if now else None,
            "baseline_auroc": base[0] if base else None,
            "auroc_drop_limit": limit,
            "ece_top_label": ece,
            "candidates": [dict(gain)],
            "window": span,
        }
    top = entries.pop("overall", None)
    if top is None:
        return None
    top["slices"] = sorted(entries.values(), key=lambda e: (e["slice"].count(","), e["slice"]))
    return top


__all__ = ["advise_multiclass"]
