"""Signals and health of a slice (DESIGN.md "Evaluation semantics": paging, health).

Three signals per slice entry of a window:

* ``evidence``: the stream's *current* e-value is at or past ``K / evidence_alpha``
  (its paging threshold). The current value, not the running maximum, so the
  signal clears when the evidence decays (a drift that ended); Ville's inequality
  bounds the chance that it ever holds under calibration, so looking at it at every
  run costs nothing in validity.
* ``material``: the effect is large enough to matter, on this window's data:
  ``ece_debiased >= materiality_ece`` (the Kumar et al. L2 estimator, which does not
  grow with noise as the plug-in ECE does) or ``|ln O/E| >= materiality_log_oe``.
  Multiclass models: the top-label ECE (15 bins) against ``materiality_ece``.
  Only assessed when the slice has enough events for a verdict (``min_events``):
  point estimates from a few events are mostly noise.
* ``fdr``: the slice is a per-run discovery (e-BH on current e-values, or BH/BY on
  Hosmer–Lemeshow and Spiegelhalter p-values; ``evaluate/fdr.py``).

Health: ``awaiting_labels`` and ``insufficient_data`` as before, except that
evidence or an FDR discovery still shows as ``watch`` (evidence needs no minimum
sample to be valid); ``drifting`` when evidence and materiality hold together with
enough events (the default paging condition, before the alerts layer refines it in
its ``after_record`` hook); ``watch`` when any one signal holds; else ``ok``.
``score_drift`` (PSI past its null-aware threshold) is reported beside them but does
not change health: a moved score distribution is not a calibration verdict.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Tolerances:
    materiality_ece: float = 0.03
    materiality_log_oe: float = 0.1


def is_material(ece_debiased: float | None, oe_ratio: float | None, tol: Tolerances) -> bool:
    if ece_debiased is not None and ece_debiased >= tol.materiality_ece:
        return True
    return (
        oe_ratio is not None and oe_ratio > 0 and abs(math.log(oe_ratio)) >= tol.materiality_log_oe
    )


def signals(
    metrics: dict[str, Any], base: str, *, evidence: bool, fdr: bool, tol: Tolerances
) -> dict[str, bool]:
    top = metrics.get("ece_top_label")  # multiclass: the top-label ECE stands in
    material = base == "ok" and (
        is_material(metrics.get("ece_debiased"), metrics.get("oe_ratio"), tol)
        or (top is not None and top >= tol.materiality_ece)
    )
    return {"evidence": evidence, "material": material, "fdr": fdr}


def health(base: str, sig: dict[str, bool]) -> str:
    """The slice's health from its base state (data volume) and its signals."""
    if base == "awaiting_labels":
        return base
    if base == "ok" and sig["evidence"] and sig["material"]:
        return "drifting"
    if sig["evidence"] or sig["material"] or sig["fdr"]:
        return "watch"
    return base


__all__ = ["Tolerances", "health", "is_material", "signals"]
