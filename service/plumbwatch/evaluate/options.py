"""The options of an evaluation run, taken from the settings (``Options.from_settings``)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from plumbwatch.config import Settings
from plumbwatch.evaluate.verdicts import Tolerances


@dataclass(frozen=True)
class Options:
    slice_cap: int = 50
    min_events: int = 100
    evidence_alpha: float = 0.01  # paging threshold K / alpha for K slices
    fdr_alpha: float = 0.05  # per-run FDR, sets `watch` only
    materiality_ece: float = 0.03  # on ece_debiased
    materiality_log_oe: float = 0.1  # on |ln O/E|
    evidence_grace_us: int = 86_400 * 1_000_000  # see evaluate/evidence.py
    cusum_arl0: int = 10_000  # in-control mean run length of a slice's CUSUM pair, rows
    # Off: no evidence, drift, FDR or advice (health from data volume alone); for
    # benchmarks that measure what they cost.
    evidence: bool = True

    @property
    def tolerances(self) -> Tolerances:
        return Tolerances(self.materiality_ece, self.materiality_log_oe)

    @classmethod
    def from_settings(cls, settings: Settings, **overrides: Any) -> Options:
        values: dict[str, Any] = {
            "slice_cap": settings.slice_cap,
            "min_events": settings.min_events,
            "evidence_alpha": settings.evidence_alpha,
            "fdr_alpha": settings.fdr_alpha,
            "materiality_ece": settings.materiality_ece,
            "materiality_log_oe": settings.materiality_log_oe,
            "evidence_grace_us": settings.evidence_grace_micros,
            "cusum_arl0": settings.cusum_arl0,
        }
        return cls(**{**values, **overrides})


__all__ = ["Options"]
