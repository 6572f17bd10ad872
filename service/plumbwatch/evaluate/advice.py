"""Recalibration advice: will a recalibration map fix the model, or must it be retrained?

For the current version, on the latest matured window (the model's shortest
declared window), overall and per slice with enough events (``min_events``):

1. Platt, beta and isotonic maps (``plumbwatch.stats.recalibration``) are fitted
   on the window's per-day sketches, not raw rows: each sketch's grid bins are
   grouped five at a time (about 0.1 logit wide), and a group enters the fit as
   its events and non-events, weighted, at the probability of its mean logit. This
   costs the same for a thousand rows or ten million, and the grouping changes a
   map far less than its sampling error does.
2. The honest gain is cross-fitted by blocks of cohort days (up to five contiguous
   blocks; each block scored with the maps fitted on the others): per-day sketches
   are temporal blocks, so the estimate respects drift within the window, as
   METHODS.md §10 prefers to random folds. ``gain_log_loss`` is the mean paired
   per-row log-loss difference (nats, positive: the map helps) with the interval
   ``mean -/+ 1.96 sd/sqrt(n)``; ``in_sample_gain`` is the optimistic value of the
   map fitted and scored on the whole window, shown for contrast.
3. The best map is the one with the largest cross-fitted gain; its knot table
   (interpolate linearly in logit) is what a pipeline applies. Per slice, maps are
   fitted only where the miscalibration is material: elsewhere the verdict cannot be
   ``recalibrate``, and the gain fields are null (this keeps a run cheap).
4. Verdict, in this order:

   * ``retrain``: AUROC fell below the version's baseline window by more than
     1.96 standard errors of the difference (Hanley & McNeil 1982 standard errors,
     the two windows taken as independent samples; AUROC on the grid, within 1e-3).
     A monotone map cannot restore ranking power.
   * ``recalibrate``: the cross-fitted gain's interval lies above zero and the
     miscalibration is material (the ``materiality_*`` tolerances of
     ``evaluate/verdicts.py``), with AUROC held.
   * ``no action`` otherwise.

Multiclass models get temperature scaling (``evaluate/advice_multiclass.py``).
Knot tables are kept for the model-level advice and for slices told to
recalibrate (a full table for every slice would bloat every stored record).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from plumbwatch.evaluate.cohorts import Window
from plumbwatch.evaluate.verdicts import Tolerances, is_material
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.calibration import l2_calibration_error_from_bins
from plumbwatch.stats.discrimination import roc_auc_from_sketch
from plumbwatch.stats.grid import N_BINS
from plumbwatch.stats.recalibration import METHODS, RecalibrationMap, fit_recalibration
from plumbwatch.store.sketches import Bucket
from plumbwatch.timefmt import format_instant

GROUP = 5
MAX_FOLDS = 5
_EPS = 1e-6
_Z = 1.96


@dataclass(frozen=True)
class Days:
    """Per-day grouped counts of one slice: ``pos``/``neg`` have shape (days, groups)."""

    p: np.ndarray  # (groups,) probability of each group's mean logit
    pos: np.ndarray
    neg: np.ndarray

    @property
    def n(self) -> float:
        return float(self.pos.sum() + self.neg.sum())


def grouped_days(sketches: list[Any]) -> Days:
    """Group each day's grid bins ``GROUP`` at a time; drop groups without rows."""
    size = -(-N_BINS // GROUP)
    fields = ("count", "sum_y", "sum_logit")
    per_day = (
        np.stack([s.grouped(fields, GROUP) for s in sketches])
        if sketches
        else np.zeros((0, len(fields), size))
    )
    count, events, logit = per_day[:, 0], per_day[:, 1], per_day[:, 2]
    total = count.sum(axis=0)
    keep = total > 0
    p = 1.0 / (1.0 + np.exp(-logit.sum(axis=0)[keep] / total[keep]))
    pos = events[:, keep]
    return Days(np.clip(p, _EPS, 1 - _EPS), pos, np.maximum(count[:, keep] - pos, 0.0))


def _fit(method: str, p: np.ndarray, pos: np.ndarray, neg: np.ndarray) -> RecalibrationMap:
    y = np.concatenate([np.ones_like(p), np.zeros_like(p)])
    w = np.concatenate([pos, neg])
    keep = w > 0
    return fit_recalibration(y[keep], np.concatenate([p, p])[keep], method, sample_weight=w[keep])


def _losses(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    q = np.clip(q, _EPS, 1 - _EPS)
    return -np.log(q), -np.log1p(-q)


def candidate(days: Days, method: str) -> dict[str, Any]:
    """One map's cross-fitted and in-sample gains (nats per row) and its parameters."""
    n_days = days.pos.shape[0]
    if n_days < 2:
        raise Undefined("too_few_days", "cross-fitting needs at least two cohort days")
    n_folds = min(MAX_FOLDS, n_days)
    fold = np.arange(n_days) * n_folds // n_days
    base1, base0 = _losses(days.p)
    total = sq = n = 0.0
    for f in range(n_folds):
        test = fold == f
        m = _fit(method, days.p, days.pos[~test].sum(0), days.neg[~test].sum(0))
        l1, l0 = _losses(m.apply(days.p))
        d1, d0 = base1 - l1, base0 - l0
        pos, neg = days.pos[test].sum(0), days.neg[test].sum(0)
        total += float(pos @ d1 + neg @ d0)
        sq += float(pos @ d1**2 + neg @ d0**2)
        n += float(pos.sum() + neg.sum())
    mean = total / n
    se = math.sqrt(max(sq - n * mean**2, 0.0) / max(n - 1.0, 1.0) / n)
    full = _fit(method, days.p, days.pos.sum(0), days.neg.sum(0))
    l1, l0 = _losses(full.apply(days.p))
    pos, neg = days.pos.sum(0), days.neg.sum(0)
    in_sample = float(pos @ (base1 - l1) + neg @ (base0 - l0)) / n
    return {
        "method": method,
        "gain_log_loss": mean,
        "gain_interval": [mean - _Z * se, mean + _Z * se],
        "in_sample_gain": in_sample,
        "params": list(full.params),
        "_map": full,
    }


def auroc_se(auroc: float, n_pos: float, n_neg: float) -> float:
    """Hanley & McNeil (1982) standard error of an AUROC (their equation 2)."""
    q1, q2 = auroc / (2 - auroc), 2 * auroc**2 / (1 + auroc)
    var = (auroc * (1 - auroc) + (n_pos - 1) * (q1 - auroc**2) + (n_neg - 1) * (q2 - auroc**2)) / (
        n_pos * n_neg
    )
    return math.sqrt(max(var, 0.0))


def _auroc(sketch: Any) -> tuple[float, float] | None:
    try:
        value = roc_auc_from_sketch(sketch).value
    except Undefined:
        return None
    return value, auroc_se(value, sketch.events, sketch.n - sketch.events)


def discrimination(window: Any, baseline: Any | None) -> dict[str, Any]:
    """AUROC now and in the baseline, the allowed drop, and whether it fell beyond it."""
    now = _auroc(window)
    base = _auroc(baseline) if baseline is not None and baseline.n > 0 else None
    out: dict[str, Any] = {
        "auroc": now[0] if now else None,
        "baseline_auroc": base[0] if base else None,
        "auroc_drop_limit": None,
        "fell": False,
    }
    if now and base:
        limit = _Z * math.hypot(now[1], base[1])
        out["auroc_drop_limit"] = limit
        out["fell"] = base[0] - now[0] > limit
    return out


def verdict(best: dict[str, Any] | None, disc: dict[str, Any], material: bool) -> tuple[str, str]:
    """The verdict and its explanation in plain words (``best``: None when no map was
    fitted because nothing material was there to fix)."""
    if disc["fell"]:
        return "retrain", (
            f"Discrimination fell: AUROC {disc['auroc']:.3f} against "
            f"{disc['baseline_auroc']:.3f} in the baseline window, a drop beyond the "
            f"{disc['auroc_drop_limit']:.3f} that sampling explains. A recalibration map keeps "
            "the ranking as it is, so it cannot restore this; retrain the model."
        )
    held = (
        f"AUROC held ({disc['auroc']:.3f} against {disc['baseline_auroc']:.3f} in the baseline)"
        if disc["baseline_auroc"] is not None and disc["auroc"] is not None
        else "AUROC not compared: the version's baseline window has not matured yet"
    )
    if best is None or not material:
        return "no action", (
            f"No action: the miscalibration is below the materiality tolerances; {held}."
        )
    lo, hi = best["gain_interval"]
    gain = f"{best['gain_log_loss']:.4f} nats per row (95 % interval {lo:.4f} to {hi:.4f})"
    if lo > 0:
        return "recalibrate", (
            f"A {best['method']} map cuts the log loss by {gain}, cross-fitted by cohort day, "
            f"and the miscalibration is material; {held}. Apply the map's knots in the "
            "pipeline, then reset the evidence with the reason."
        )
    return "no action", (
        f"No action: the best map ({best['method']}) would change the log loss by {gain}, "
        f"not clearly better than the model; {held}."
    )


def advise_slice(
    days: list[Any], window_sketch: Any, baseline: Any | None, tol: Tolerances, *, fit: bool
) -> dict[str, Any]:
    """Advice for one slice from its per-day sketches (in day order) over the window.

    With ``fit`` False, maps are fitted only if the miscalibration is material (else
    the verdict cannot be "recalibrate" and follows from AUROC alone, and the gain
    fields are null): a slice's advice then costs next to nothing when all is well.
    """
    c10 = window_sketch.coarse_sums(10)
    ece = l2_calibration_error_from_bins(c10["count"], c10["sum_y"], c10["sum_p"], debiased=True)
    sum_p = window_sketch.total("sum_p")
    oe = window_sketch.events / sum_p if sum_p > 0 else None
    material = is_material(ece, oe, tol)
    disc = discrimination(window_sketch, baseline)
    found = []
    reasons = {}
    grouped = grouped_days(days)
    if fit or material:
        for method in METHODS:
            try:
                found.append(candidate(grouped, method))
            except Undefined as exc:
                reasons[method] = exc.reason
    best = max(found, key=lambda c: c["gain_log_loss"]) if found else None
    word, explanation = verdict(best, disc, material)
    return {
        "method": best["method"] if best else None,
        "n": round(grouped.n),
        "gain_log_loss": best["gain_log_loss"] if best else None,
        "gain_interval": best["gain_interval"] if best else None,
        "in_sample_gain": best["in_sample_gain"] if best else None,
        "params": best["params"] if best else None,
        "knots": [list(k) for k in best["_map"].knots()] if best else None,
        "verdict": word,
        "explanation": explanation,
        "auroc": disc["auroc"],
        "baseline_auroc": disc["baseline_auroc"],
        "auroc_drop_limit": disc["auroc_drop_limit"],
        "ece_debiased": ece,
        "oe_ratio": oe,
        "candidates": [{k: v for k, v in c.items() if k != "_map"} for c in found],
        "not_fitted": reasons,
    }


def advise(
    *,
    buckets: dict[tuple[str, int, str], Bucket],
    version: str,
    window: Window,
    baselines: dict[tuple[str, str], Bucket],
    enough: set[str],
    tol: Tolerances,
) -> dict[str, Any] | None:
    """The record's ``recalibration`` object for a binary model (None without advice)."""
    per_slice: dict[str, list[Any]] = {}
    for (v, day, name), bucket in sorted(buckets.items(), key=lambda kv: kv[0][1]):
        if v == version and name in enough and window.first_day <= day < window.end_day:
            per_slice.setdefault(name, []).append(bucket.sketch)
    entries = {}
    for name, days in per_slice.items():
        total = days[0]
        for s in days[1:]:
            total = total + s
        base = baselines.get((version, name))
        try:
            entry = advise_slice(
                days, total, base.sketch if base else None, tol, fit=name == "overall"
            )
        except Undefined:
            continue
        entries[name] = {"slice": name, "version": version, **entry}
        if name != "overall" and entry["verdict"] != "recalibrate":
            entries[name]["knots"] = None
    top = entries.pop("overall", None)
    if top is None:
        return None
    span = {
        "window": window.name,
        "start": format_instant(window.start_us),
        "end": format_instant(window.end_us),
    }
    top["window"] = span
    top["slices"] = [
        {**e, "window": span}
        for e in sorted(entries.values(), key=lambda e: (e["slice"].count(","), e["slice"]))
    ]
    return top


__all__ = ["advise", "advise_slice", "auroc_se", "candidate", "discrimination", "grouped_days"]
